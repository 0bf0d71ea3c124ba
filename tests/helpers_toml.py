"""A TOML writer for the model-file shape (nested tables, arrays of tables, scalars
and flat lists). Only the tests write model files from specs, so it lives here."""
from __future__ import annotations

import json
import math
import numbers
import re
from typing import Any


# ---------------------------------------------------------------------------
_BARE_KEY = re.compile(r"^[A-Za-z0-9_-]+$")


def _toml_key(key: str) -> str:
    return key if _BARE_KEY.match(key) else json.dumps(key)


def _toml_value(value: Any) -> str:
    if isinstance(value, bool):
        return "true" if value else "false"
    if isinstance(value, str):
        return json.dumps(value)  # JSON string escapes are valid TOML basic strings
    if isinstance(value, numbers.Integral):
        return str(int(value))
    if isinstance(value, numbers.Real):
        v = float(value)
        if math.isnan(v):
            return "nan"
        if math.isinf(v):
            return "inf" if v > 0 else "-inf"
        return repr(v)
    if isinstance(value, (list, tuple)):
        return "[" + ", ".join(_toml_value(v) for v in value) + "]"
    if isinstance(value, dict):
        return "{" + ", ".join(f"{_toml_key(k)} = {_toml_value(v)}"
                               for k, v in value.items()) + "}"
    raise TypeError(f"cannot write {type(value).__name__} to TOML")


def dumps_toml(d: dict) -> str:
    """TOML text for a nested dict of the model-file shape."""
    lines: list[str] = []

    def emit(table: dict, path: list[str], array: bool = False) -> None:
        # a sample's "exclude" stays an inline table so the sample reads as one block
        def inline(k, v):
            return k == "exclude" and isinstance(v, dict)
        scalars = {k: v for k, v in table.items()
                   if inline(k, v) or not (isinstance(v, dict) or _is_table_array(v))}
        subtables = {k: v for k, v in table.items() if isinstance(v, dict) and not inline(k, v)}
        arrays = {k: v for k, v in table.items() if _is_table_array(v)}
        if path and (array or scalars or not (subtables or arrays)):
            name = ".".join(_toml_key(p) for p in path)
            lines.append(f"[[{name}]]" if array else f"[{name}]")
            lines.extend(f"{_toml_key(k)} = {_toml_value(v)}" for k, v in scalars.items())
            lines.append("")
        elif scalars:  # top-level keys (not used by the model-file shape)
            lines.extend(f"{_toml_key(k)} = {_toml_value(v)}" for k, v in scalars.items())
        for k, v in subtables.items():
            emit(v, path + [k])
        for k, v in arrays.items():
            for item in v:
                emit(item, path + [k], array=True)

    emit(d, [])
    return "\n".join(lines).rstrip() + "\n"


def _is_table_array(v) -> bool:
    return isinstance(v, list) and bool(v) and all(isinstance(x, dict) for x in v)


def spec_to_toml(spec) -> str:
    """A model file for ``spec`` (``read_model`` of it gives back an equal spec,
    apart from ``source``; the data file path is written as stored)."""
    from robustgmm.modelfile import spec_to_dict
    return dumps_toml(spec_to_dict(spec))
