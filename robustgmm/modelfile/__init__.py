"""Read and validate a model file (TOML) into a frozen :class:`~robustgmm.spec.Spec`.

The model file is data: it is parsed with the standard library ``tomllib`` and
nothing in it is evaluated or imported. Every problem found is collected as one
line that names the file, the key path and the offending value, for example::

    model.toml: [method] steps = 3: must be 1, 2 or "iterated"

and all of them are raised together as :class:`robustgmm.errors.InputError`.
Unknown or misspelt keys are reported with the closest valid key (``difflib``), or
with the section they belong to when the key is valid elsewhere.

Public functions: :func:`read_model`, :func:`spec_from_dict`, :func:`spec_to_dict`
(``spec_from_dict(spec_to_dict(s), source=s.source) == s``) and
:func:`spec_to_toml` (a model file text for a spec).
"""
from __future__ import annotations

import dataclasses
import difflib
import json
import math
import numbers
import re
from pathlib import Path
from typing import Any, Callable

try:  # Python >= 3.11
    import tomllib
except ModuleNotFoundError:  # pragma: no cover - Python 3.10
    import tomli as tomllib  # type: ignore[no-redef]

from ..errors import InputError
from ..spec import Regressor, SampleFilter, Spec, Thresholds, Vary, term_labels

#: Data file extensions the data layer reads (see :mod:`robustgmm.data`).
SUPPORTED_EXTENSIONS = (".csv", ".parquet", ".dta", ".xlsx")

# Valid keys per table; used for unknown-key messages and "belongs in" hints.
SECTIONS: dict[str, tuple[str, ...]] = {
    "data": ("file", "unit", "period"),
    "model": ("outcome", "outcome_lags", "time_effects", "regressors"),
    "method": ("equations", "transform", "steps", "errors"),
    "instruments": ("first_lag", "last_lag", "form", "extra"),
    "sample": ("name", "period_from", "period_to", "exclude"),
    "audit": ("focus", "alpha", "vary", "thresholds"),
}
REGRESSOR_KEYS = ("name", "lags", "role")
EXCLUDE_KEYS = ("column", "values")
VARY_KEYS = ("equations", "transform", "steps", "form", "first_lag", "last_lag",
             "time_effects", "errors", "roles", "sample")
THRESHOLD_KEYS = tuple(f.name for f in dataclasses.fields(Thresholds))
# Label prefix reserved for period dummies (``period[1984]``); a variable with this
# name would make its terms look like dummies.
RESERVED_NAMES = ("period",)


from .checks import (MISSING as _MISSING, Bad as _Bad, closest as _closest, fmt as _fmt,
                     key_text as _key, threshold_check as _threshold_validator, v_bool,
                     v_equations, v_errors, v_first_lag, v_form, v_lags, v_last_lag, v_name,
                     v_name_list, v_period, v_prob, v_role, v_scalar_list, v_steps, v_transform)


# ---------------------------------------------------------------------------
# the parser
# ---------------------------------------------------------------------------
class _Parser:
    def __init__(self, source: str):
        self.source = source
        self.problems: list[str] = []
        self.failed: set[str] = set()  # keys whose values failed (cross-checks skip them)

    # -- reporting -----------------------------------------------------------
    def add(self, where: str, message: str, value: Any = _MISSING) -> None:
        shown = "" if value is _MISSING else f" = {_fmt(value)}"
        self.problems.append(f"{self.source}: {where}{shown}: {message}")

    def unknown_keys(self, table: dict, allowed, where: str, header: str) -> None:
        """Report keys of ``table`` not in ``allowed``; ``header`` is the table
        shown in messages ("[method]") and ``where`` its dotted name ("method")."""
        for key in table:
            if key in allowed:
                continue
            home = [sec for sec, keys in SECTIONS.items()
                    if key in keys and sec != where]
            hint = _closest(key, allowed)
            if home:  # a valid key in the wrong table: say where it goes
                msg = f"unknown key here; it belongs in [{home[0]}]"
            elif hint is not None:
                msg = f"unknown key (did you mean {_fmt(hint)}?)"
            else:
                msg = "unknown key; valid keys: " + ", ".join(allowed)
            prefix = f"{header} " if header else ""
            self.problems.append(f"{self.source}: {prefix}{_key(key)}: {msg}")

    def table(self, parent: dict, key: str, header: str) -> dict:
        value = parent.get(key, {})
        if not isinstance(value, dict):
            self.add(header, "must be a table (a [section] with keys)", value)
            return {}
        return value

    def get(self, table: dict, key: str, header: str, check: Callable,
            default: Any = _MISSING, required: bool = False) -> Any:
        if key not in table:
            if required:
                self.add(f"{header} {key}", "is missing (required)")
            return default
        value = table[key]
        try:
            return check(value)
        except _Bad as bad:
            self.add(f"{header} {key}", str(bad), value)
            self.failed.add(key)
            return default

    # -- sections ------------------------------------------------------------
    def parse(self, d: Any, base_dir) -> Spec | None:
        if not isinstance(d, dict):
            self.add("model", "must be a table of sections ([data], [model], ...)")
            return None
        for key, value in d.items():
            if key not in SECTIONS:
                hint = _closest(key, SECTIONS)
                home = [sec for sec, keys in SECTIONS.items() if key in keys]
                if hint is not None:
                    msg = f"unknown section (did you mean [{hint}]?)"
                elif home:
                    msg = f"unknown top-level key; it belongs in [{home[0]}]"
                else:
                    msg = "unknown section; valid sections: " + ", ".join(
                        f"[{s}]" for s in SECTIONS)
                self.problems.append(f"{self.source}: [{_key(key)}]: {msg}"
                                     if isinstance(value, dict)
                                     else f"{self.source}: {_key(key)}: {msg}")
        fields: dict[str, Any] = {"source": self.source}

        data = self.table(d, "data", "[data]")
        self.unknown_keys(data, SECTIONS["data"], "data", "[data]")
        fields["unit"] = self.get(data, "unit", "[data]", v_name, required=True)
        fields["period"] = self.get(data, "period", "[data]", v_name, required=True)
        file = self.get(data, "file", "[data]", self._check_file)
        if file is not _MISSING:
            fields["data_file"] = Path(file) if base_dir is None else Path(base_dir) / file

        model = self.table(d, "model", "[model]")
        self.unknown_keys(model, SECTIONS["model"], "model", "[model]")
        fields["outcome"] = self.get(model, "outcome", "[model]", v_name, required=True)
        fields["outcome_lags"] = self.get(
            model, "outcome_lags", "[model]",
            v_lags(1, "a dynamic model needs at least one lag of the outcome, e.g. [1]"))
        fields["time_effects"] = self.get(model, "time_effects", "[model]", v_bool)
        fields["regressors"] = self.regressors(model.get("regressors", _MISSING))

        method = self.table(d, "method", "[method]")
        self.unknown_keys(method, SECTIONS["method"], "method", "[method]")
        for key, check in (("equations", v_equations), ("transform", v_transform),
                           ("steps", v_steps), ("errors", v_errors)):
            fields[key] = self.get(method, key, "[method]", check)

        inst = self.table(d, "instruments", "[instruments]")
        self.unknown_keys(inst, SECTIONS["instruments"], "instruments", "[instruments]")
        fields["first_lag"] = self.get(inst, "first_lag", "[instruments]", v_first_lag)
        fields["last_lag"] = self.get(inst, "last_lag", "[instruments]", v_last_lag)
        fields["form"] = self.get(inst, "form", "[instruments]", v_form)
        fields["extra_instruments"] = self.get(inst, "extra", "[instruments]", v_name_list)

        if "sample" in d:
            sample = self.table(d, "sample", "[sample]")
            fields["sample"] = self.sample(sample, "[sample]", "sample")

        audit = self.table(d, "audit", "[audit]")
        self.unknown_keys(audit, SECTIONS["audit"], "audit", "[audit]")
        focus = self.get(audit, "focus", "[audit]", v_name_list)
        fields["focus"] = focus
        fields["alpha"] = self.get(audit, "alpha", "[audit]", v_prob)
        if "thresholds" in audit:
            fields["thresholds"] = self.thresholds(
                self.table(audit, "thresholds", "[audit.thresholds]"))
        if "vary" in audit:
            fields["vary"] = self.vary(self.table(audit, "vary", "[audit.vary]"))

        fields = {k: v for k, v in fields.items() if v is not _MISSING}
        if any(k not in fields for k in ("unit", "period", "outcome")):
            return None
        spec = Spec(**fields)
        self.cross_checks(spec)
        return spec

    def _check_file(self, v):
        if not isinstance(v, str) or not v.strip():
            raise _Bad("must be a file name in quotes, e.g. \"panel.csv\"")
        suffix = Path(v).suffix.lower()
        if suffix not in SUPPORTED_EXTENSIONS:
            raise _Bad(f"unsupported file type {suffix or '(no extension)'!s}: use "
                       + ", ".join(SUPPORTED_EXTENSIONS))
        return v

    def regressors(self, value) -> Any:
        if value is _MISSING:
            return _MISSING
        if not isinstance(value, list) or not all(isinstance(r, dict) for r in value):
            self.add("[model] regressors",
                     "must be a list of [[model.regressors]] tables with name, lags and role",
                     value)
            self.failed.add("regressors")
            return _MISSING
        out = []
        for i, table in enumerate(value, start=1):
            label = table.get("name")
            header = (f"[[model.regressors]] #{i} ({_key(label)})" if isinstance(label, str)
                      else f"[[model.regressors]] #{i}")
            self.unknown_keys(table, REGRESSOR_KEYS, "model.regressors", header)
            name = self.get(table, "name", header, v_name, required=True)
            lags = self.get(table, "lags", header,
                            v_lags(0, "0 is the current period"), default=(0,))
            role = self.get(table, "role", header, v_role, default="exogenous")
            if name is not _MISSING:
                out.append(Regressor(name=name, lags=lags, role=role))
        return tuple(out)

    def sample(self, table: dict, header: str, where: str) -> Any:
        self.unknown_keys(table, SECTIONS["sample"], where, header)
        name = self.get(table, "name", header, v_name)
        pf = self.get(table, "period_from", header, v_period, default=None)
        pt = self.get(table, "period_to", header, v_period, default=None)
        if pf is not None and pt is not None and pf > pt:
            self.add(f"{header} period_from = {pf}, period_to", "must not be before period_from", pt)
        column, values = None, ()
        if "exclude" in table:
            exclude = table["exclude"]
            if not isinstance(exclude, dict):
                self.add(f"{header} exclude",
                         'must be a table: exclude = {column = "...", values = [...]}', exclude)
            else:
                eh = f"{header} exclude"
                self.unknown_keys(exclude, EXCLUDE_KEYS, f"{where}.exclude", eh)
                column = self.get(exclude, "column", eh, v_name, default=None, required=True)
                values = self.get(exclude, "values", eh, v_scalar_list, default=(), required=True)
        if name is _MISSING:
            name = _describe_sample(pf, pt, column, values)
        return SampleFilter(name=name, period_from=pf, period_to=pt,
                            exclude_column=column, exclude_values=values)

    def thresholds(self, table: dict) -> Thresholds:
        header = "[audit.thresholds]"
        self.unknown_keys(table, THRESHOLD_KEYS, "audit.thresholds", header)
        values = {}
        for key in THRESHOLD_KEYS:
            got = self.get(table, key, header, _threshold_validator(key))
            if got is not _MISSING:
                values[key] = got
        return Thresholds(**values)

    def vary(self, table: dict) -> Vary:
        header = "[audit.vary]"
        self.unknown_keys(table, VARY_KEYS, "audit.vary", header)
        scalar = {"equations": v_equations, "transform": v_transform, "steps": v_steps,
                  "form": v_form, "first_lag": v_first_lag, "last_lag": v_last_lag,
                  "time_effects": v_bool, "errors": v_errors}
        values: dict[str, Any] = {}
        for key, check in scalar.items():
            if key not in table:
                continue
            raw = table[key]
            got = self._vary_list(raw, check, f"{header} {key}")
            if got is not None:
                values[key] = got
        if "roles" in table:
            roles = self.table(table, "roles", "[audit.vary.roles]")
            pairs = []
            for reg, raw in roles.items():
                got = self._vary_list(raw, v_role, f"[audit.vary.roles] {_key(reg)}")
                if got is not None:
                    pairs.append((reg, got))
            values["roles"] = tuple(pairs)
        if "sample" in table:
            raw = table["sample"]
            if not isinstance(raw, list) or not all(isinstance(s, dict) for s in raw):
                self.add("[audit.vary] sample",
                         "must be a list of [[audit.vary.sample]] tables", raw)
            elif not raw:
                self.add("[audit.vary] sample", "lists no samples; remove the key or add one", raw)
            else:
                samples = []
                for i, s in enumerate(raw, start=1):
                    label = s.get("name")
                    head = (f"[[audit.vary.sample]] #{i} ({_key(label)})" if isinstance(label, str)
                            else f"[[audit.vary.sample]] #{i}")
                    samples.append(self.sample(s, head, "audit.vary.sample"))
                values["samples"] = tuple(samples)
        return Vary(**values)

    def _vary_list(self, raw, check, where):
        if not isinstance(raw, list):
            self.add(where, "must be a list of values to try, e.g. [1, 2]", raw)
            return None
        if not raw:
            self.add(where, "lists no values; remove the key or give at least one value", raw)
            return None
        out, ok = [], True
        for item in raw:
            try:
                parsed = check(item)
            except _Bad as bad:
                self.add(where, f"{_fmt(item)} is not valid: {bad}", raw)
                ok = False
                continue
            if parsed in out and type(parsed) is type(out[out.index(parsed)]):
                self.add(where, f"{_fmt(item)} is listed twice", raw)
                ok = False
                continue
            out.append(parsed)
        return tuple(out) if ok else None

    # -- checks across keys --------------------------------------------------
    def cross_checks(self, spec: Spec) -> None:
        add = self.add
        if spec.unit == spec.period:
            add("[data] period", f"is the same column as [data] unit", spec.period)
        for key, col in (("unit", spec.unit), ("period", spec.period)):
            if spec.outcome == col:
                add("[model] outcome", f"is the {key} column; choose the outcome variable",
                    spec.outcome)
        if spec.outcome in RESERVED_NAMES:
            add("[model] outcome", "the name \"period\" is reserved for period-dummy labels "
                "(period[1984]); rename the column", spec.outcome)
        seen: dict[str, int] = {}
        for i, reg in enumerate(spec.regressors, start=1):
            header = f"[[model.regressors]] #{i} ({_key(reg.name)}) name"
            if reg.name == spec.outcome:
                add(header, "is the outcome; its lags go in [model] outcome_lags", reg.name)
            elif reg.name in (spec.unit, spec.period):
                add(header, "is the unit or period column, not a variable", reg.name)
            elif reg.name in RESERVED_NAMES:
                add(header, "the name \"period\" is reserved for period-dummy labels "
                    "(period[1984]); rename the column", reg.name)
            if reg.name in seen:
                add(header, f"duplicate regressor (also #{seen[reg.name]}); list each "
                    "variable once with all its lags", reg.name)
            else:
                seen[reg.name] = i
        model_vars = {spec.outcome, *seen}
        for name in spec.extra_instruments:
            if name in model_vars:
                add("[instruments] extra", f"{_fmt(name)} is already a model variable; "
                    "list only additional instrument columns", list(spec.extra_instruments))
            elif name in (spec.unit, spec.period):
                add("[instruments] extra", f"{_fmt(name)} is the unit or period column",
                    list(spec.extra_instruments))
        if (spec.last_lag is not None and spec.last_lag < spec.first_lag
                and not self.failed & {"first_lag", "last_lag"}):
            add("[instruments] last_lag", f"is below first_lag = {spec.first_lag}; "
                "the lag window would be empty", spec.last_lag)

        labels = term_labels(spec)
        # labels are only known when the outcome lags and regressors parsed cleanly
        focus = () if self.failed & {"outcome_lags", "regressors", "name", "lags"} else spec.focus
        for term in focus:
            if term not in labels:
                hint = _closest(term, labels)
                if term == "const" or term.startswith("period["):
                    msg = f"{_fmt(term)}: the constant and period dummies cannot be focus terms"
                else:
                    msg = f"{_fmt(term)} is not a term of the model"
                    if hint:
                        msg += f" (did you mean {_fmt(hint)}?)"
                msg += "; terms: " + ", ".join(labels)
                add("[audit] focus", msg, list(spec.focus))

        vary = spec.vary
        first_lags = set(vary.first_lag) | {spec.first_lag}
        for value in ([] if self.failed & {"first_lag", "last_lag"} else vary.last_lag):
            if value is not None and value < min(first_lags):
                add("[audit.vary] last_lag", f"{value} is below every first_lag tried "
                    f"({', '.join(map(str, sorted(first_lags)))}); no variant could use it",
                    ["all" if v is None else v for v in vary.last_lag])
        if spec.last_lag is not None and not self.failed & {"first_lag", "last_lag"}:
            for value in vary.first_lag:
                if value > spec.last_lag and not any(v is None or v >= value for v in vary.last_lag):
                    add("[audit.vary] first_lag", f"{value} is above last_lag = {spec.last_lag} "
                        "and no varied last_lag reaches it; no variant could use it",
                        list(vary.first_lag))
        for reg, _roles in vary.roles:
            if reg not in seen:
                hint = _closest(reg, list(seen))
                add(f"[audit.vary.roles] {_key(reg)}", "is not a regressor of the model"
                    + (f" (did you mean {_fmt(hint)}?)" if hint else
                       ("; regressors: " + ", ".join(seen) if seen else "; the model has none")))
        names = [spec.sample.name]
        for i, s in enumerate(vary.samples, start=1):
            head = f"[[audit.vary.sample]] #{i} ({_key(s.name)})"
            if s.name in names:
                add(f"{head} name", "is used by another sample; give each a distinct name", s.name)
            names.append(s.name)
            if dataclasses.replace(s, name=spec.sample.name) == spec.sample:
                add(head, "has the same restrictions as the base sample; it would repeat it")


def _describe_sample(pf, pt, column, values) -> str:
    parts = []
    if pf is not None and pt is not None:
        parts.append(f"periods {pf}-{pt}")
    elif pf is not None:
        parts.append(f"periods from {pf}")
    elif pt is not None:
        parts.append(f"periods to {pt}")
    if column is not None:
        parts.append(f"excluding {column} in {{{', '.join(map(str, values))}}}")
    return ", ".join(parts) if parts else "full sample"


# ---------------------------------------------------------------------------
# public API
# ---------------------------------------------------------------------------
def spec_from_dict(d: dict, base_dir=None, source: str = "<dict>") -> Spec:
    """Validate a model-file dict (the parsed TOML) and return a :class:`Spec`.

    ``base_dir`` is the folder that ``[data] file`` is relative to (the model
    file's folder); ``source`` names the model in messages. Raises
    :class:`InputError` listing every problem found.
    """
    parser = _Parser(source)
    spec = parser.parse(d, base_dir)
    if parser.problems:
        raise InputError(parser.problems)
    assert spec is not None
    return spec


def read_model(path) -> Spec:
    """Read a TOML model file; the data file is resolved relative to its folder."""
    path = Path(path)
    source = str(path)
    if not path.exists():
        raise InputError(f"{source}: model file not found")
    if path.is_dir():
        raise InputError(f"{source}: is a folder, not a model file")
    try:
        raw = path.read_bytes()
    except OSError as exc:
        raise InputError(f"{source}: cannot read the model file ({exc.strerror or exc})") from None
    try:
        text = raw.decode("utf-8")
    except UnicodeDecodeError as exc:
        line = raw[: exc.start].count(b"\n") + 1
        raise InputError(f"{source}: line {line}: not UTF-8 text; save the model file as UTF-8") from None
    if text.startswith("\ufeff"):  # a byte-order mark some editors add
        text = text[1:]
    try:
        d = tomllib.loads(text)
    except tomllib.TOMLDecodeError as exc:
        msg = str(exc)
        m = re.search(r"\(at line (\d+), column (\d+)\)", msg)
        if m:
            msg = msg[: m.start()].strip()
            raise InputError(f"{source}: line {m.group(1)}, column {m.group(2)}: "
                             f"TOML syntax error: {msg}") from None
        raise InputError(f"{source}: TOML syntax error: {msg}") from None
    return spec_from_dict(d, base_dir=path.parent, source=source)


def _sample_to_dict(s: SampleFilter) -> dict:
    out: dict[str, Any] = {"name": s.name}
    if s.period_from is not None:
        out["period_from"] = s.period_from
    if s.period_to is not None:
        out["period_to"] = s.period_to
    if s.exclude_column is not None:
        out["exclude"] = {"column": s.exclude_column, "values": list(s.exclude_values)}
    return out


def spec_to_dict(spec: Spec) -> dict:
    """The model-file dict of a spec: ``spec_from_dict(spec_to_dict(s), source=s.source) == s``.

    The data file is written as stored in the spec (already resolved against the
    model file's folder), so read it back with ``base_dir=None``.
    """
    data: dict[str, Any] = {}
    if spec.data_file is not None:
        data["file"] = str(spec.data_file)
    data["unit"] = spec.unit
    data["period"] = spec.period
    d: dict[str, Any] = {
        "data": data,
        "model": {
            "outcome": spec.outcome,
            "outcome_lags": list(spec.outcome_lags),
            "time_effects": spec.time_effects,
            "regressors": [{"name": r.name, "lags": list(r.lags), "role": r.role}
                           for r in spec.regressors],
        },
        "method": {"equations": spec.equations, "transform": spec.transform,
                   "steps": spec.steps, "errors": spec.errors},
        "instruments": {"first_lag": spec.first_lag,
                        "last_lag": "all" if spec.last_lag is None else spec.last_lag,
                        "form": spec.form, "extra": list(spec.extra_instruments)},
        "sample": _sample_to_dict(spec.sample),
        "audit": {"focus": list(spec.focus), "alpha": spec.alpha,
                  "thresholds": dataclasses.asdict(spec.thresholds)},
    }
    if not spec.regressors:
        del d["model"]["regressors"]
    vary: dict[str, Any] = {}
    v = spec.vary
    for key in ("equations", "transform", "steps", "form", "first_lag", "time_effects", "errors"):
        if getattr(v, key):
            vary[key] = list(getattr(v, key))
    if v.last_lag:
        vary["last_lag"] = ["all" if x is None else x for x in v.last_lag]
    if v.roles:
        vary["roles"] = {name: list(roles) for name, roles in v.roles}
    if v.samples:
        vary["sample"] = [_sample_to_dict(s) for s in v.samples]
    if vary:
        d["audit"]["vary"] = vary
    return d


# ---------------------------------------------------------------------------
# a TOML writer for the model-file schema (nested tables, arrays of tables,
# scalars and flat lists); used to save a spec as a model file.
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


def spec_to_toml(spec: Spec) -> str:
    """A model file for ``spec`` (``read_model`` of it gives back an equal spec,
    apart from ``source``; the data file path is written as stored)."""
    return dumps_toml(spec_to_dict(spec))
