"""Read and validate a model file (TOML) into a frozen :class:`~robustgmm.spec.Spec`.

The model file is data: it is parsed with the standard library ``tomllib`` and
nothing in it is evaluated or imported. Every problem found is collected as one
line that names the file, the key path and the offending value, for example::

    model.toml: [method] steps = 3: must be 1, 2 or "iterated"

and all of them are raised together as :class:`robustgmm.errors.InputError`.
Unknown or misspelt keys are reported with the closest valid key (``difflib``), or
with the section they belong to when the key is valid elsewhere.

The modules: :mod:`.checks` (the value checks, shared with ``Spec``), :mod:`.schema`
(the schema as one table keyed by full key path, and the reader that follows it),
:mod:`.crosschecks` (checks across keys). Public functions: :func:`read_model`,
:func:`spec_from_dict` and :func:`spec_to_dict`
(``spec_from_dict(spec_to_dict(s), source=s.source) == s``).
"""
from __future__ import annotations

import dataclasses
import re
from pathlib import Path
from typing import Any

try:  # Python >= 3.11
    import tomllib
except ModuleNotFoundError:  # pragma: no cover - Python 3.10
    import tomli as tomllib  # type: ignore[no-redef]

from ..errors import InputError
from ..spec import SampleFilter, Spec
from .crosschecks import cross_checks
from .run import read_run  # noqa: F401  ([run]: how to run, not what to estimate)
from .simulate import read_simulate  # noqa: F401  ([simulate]: the Monte Carlo's world)
from .schema import SECTIONS, VARY_KEYS, Reader  # noqa: F401  (SECTIONS, VARY_KEYS: re-exported)

__all__ = ["read_model", "read_run", "read_simulate", "spec_from_dict", "spec_to_dict", "SECTIONS", "VARY_KEYS"]


def spec_from_dict(d: dict, base_dir=None, source: str = "<dict>") -> Spec:
    """Validate a model-file dict (the parsed TOML) and return a :class:`Spec`.

    ``base_dir`` is the folder that ``[data] file`` is relative to (the model
    file's folder); ``source`` names the model in messages. Raises
    :class:`InputError` listing every problem found.
    """
    reader = Reader(source)
    spec = reader.read(d, base_dir)
    if spec is not None:
        cross_checks(spec, reader)
    if reader.problems:
        raise InputError(reader.problems)
    assert spec is not None
    return spec


def read_model(path) -> Spec:
    """Read a TOML model file; the data file is resolved relative to its folder."""
    path = Path(path)
    return spec_from_dict(load_toml(path), base_dir=path.parent, source=str(path))


def load_toml(path) -> dict:
    """The parsed TOML of a model file; a missing, unreadable, non-UTF-8 or
    ill-formed file is one :class:`InputError` line naming it (and the line)."""
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
    return d


def _sample_to_dict(s: SampleFilter) -> dict:
    out: dict[str, Any] = {"name": s.name}
    if s.period_from is not None:
        out["period_from"] = s.period_from
    if s.period_to is not None:
        out["period_to"] = s.period_to
    if s.exclude_column is not None:
        out["exclude"] = {"column": s.exclude_column, "values": list(s.exclude_values)}
    if s.keep_column is not None:
        out["keep"] = {"column": s.keep_column, "values": list(s.keep_values)}
    if s.split is not None:
        out["split"] = s.split
    if s.min_units != SampleFilter.min_units:
        out["min_units"] = s.min_units
    return out


def _window(window) -> list:
    return [window[0], "all" if window[1] is None else window[1]]


def _regressor_to_dict(r) -> dict:
    out: dict[str, Any] = {"name": r.name, "lags": list(r.lags), "role": r.role}
    if r.instrument_lags is not None:
        out["instrument_lags"] = _window(r.instrument_lags)
    if r.instrument_form is not None:
        out["instrument_form"] = r.instrument_form
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
            "regressors": [_regressor_to_dict(r) for r in spec.regressors],
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
    if spec.max_variants is not None:
        d["audit"]["max_variants"] = spec.max_variants
    if spec.influence != "base":
        d["audit"]["influence"] = spec.influence
    if spec.max_drop_share != 0.05:
        d["audit"]["max_drop_share"] = spec.max_drop_share
    if not spec.regressors:
        del d["model"]["regressors"]
    if spec.outcome_instrument_lags is not None:
        d["model"]["instrument_lags"] = _window(spec.outcome_instrument_lags)
    if spec.outcome_instrument_form is not None:
        d["model"]["instrument_form"] = spec.outcome_instrument_form
    if spec.gmm_instruments:
        d["instruments"]["gmm"] = [
            {"name": g.name, **({"lags": _window(g.lags)} if g.lags is not None else {}),
             **({"form": g.form} if g.form is not None else {})} for g in spec.gmm_instruments]
    vary: dict[str, Any] = {}
    v = spec.vary
    for key in ("equations", "transform", "steps", "form", "first_lag", "time_effects", "errors"):
        if getattr(v, key):
            vary[key] = list(getattr(v, key))
    if v.outcome_lags:
        vary["outcome_lags"] = [list(lags) for lags in v.outcome_lags]
    if v.drop:
        vary["drop"] = [list(names) for names in v.drop]
    if v.lags:
        vary["lags"] = {name: [list(lags) for lags in lists] for name, lists in v.lags}
    if v.instrument_lags:
        vary["instrument_lags"] = {name: [_window(w) for w in windows]
                                   for name, windows in v.instrument_lags}
    if v.last_lag:
        vary["last_lag"] = ["all" if x is None else x for x in v.last_lag]
    if v.roles:
        vary["roles"] = {name: list(roles) for name, roles in v.roles}
    if v.samples:
        vary["sample"] = [_sample_to_dict(s) for s in v.samples]
    if vary:
        d["audit"]["vary"] = vary
    if spec.labels:
        d["labels"] = dict(spec.labels)
    if spec.stars:
        d["report"] = {"stars": True}
    return d
