"""The base model's statement and the closest acceptable variant (written as model-file lines)."""
from __future__ import annotations

import math
from dataclasses import asdict, dataclass
from typing import Any, Mapping, Sequence

import numpy as np
import pandas as pd

from ...options import LEVEL_GROUP
from ...options import Effect, Evidence, Verdict
from ..records import (AuditVerdict, BaseEstimate, Driver, Evaluation, Firing, Influence,
                       Rule, TermVerdict, _clean, _num)
from ...spec import Spec, Thresholds
from .rules import p_text, value_text


def _base_statement(variants, flags, base_pos, th) -> str:
    """The sentence every document opens with when the base model is no anchor."""
    if base_pos is None:
        return "The audit has no base model."
    row = variants.iloc[base_pos]
    if row["status"] != "ok":
        reason = str(row.get("reason") or "").strip()
        return ("The base model could not be estimated" + (f" ({reason})" if reason else "")
                + ".")
    ev = flags["evidence"].iloc[base_pos]
    if ev == Evidence.REJECTED.value:
        parts = []
        if flags["hansen_rejects"].iloc[base_pos]:
            parts.append(f"Hansen p = {p_text(row.get('hansen_p'))}")
        if flags["ar2_rejects"].iloc[base_pos]:
            parts.append(f"AR(2) p = {p_text(row.get('ar2_p'))}")
        if flags["difference_hansen_level_rejects"].iloc[base_pos]:
            parts.append("level-equation difference-in-Hansen p = "
                         f"{p_text(row.get('diff_hansen_level_p'))}")
        return f"The base model fails its own tests ({', '.join(parts)})."
    if ev == Evidence.UNTESTABLE.value and not th["count_untestable"]:
        return ("The base model cannot be tested: " + _missing_tests(row) + " cannot be "
                "computed (an exactly identified instrument set leaves nothing to test).")
    return ""


def _missing_tests(row) -> str:
    names = []
    if not math.isfinite(_num(row.get("hansen_p"))):
        names.append("the Hansen test")
    if not math.isfinite(_num(row.get("ar2_p"))):
        names.append("the AR(2) test")
    if str(row.get("equations", "system")) == "system" and not math.isfinite(
            _num(row.get("diff_hansen_level_p"))):
        names.append("the level-equation difference-in-Hansen test")
    return " and ".join(names) if names else "a required test"


# model-file place of each varied setting (for the lines that make a variant the base)
_SECTION = {"equations": "method", "transform": "method", "steps": "method",
            "errors": "method", "form": "instruments", "first_lag": "instruments",
            "last_lag": "instruments", "time_effects": "model"}


def _toml_value(setting: str, value: str) -> str:
    if setting in ("first_lag",) or (setting in ("last_lag", "steps") and value.isdigit()):
        return value
    if setting == "time_effects":
        return value.lower()
    return f'"{value}"'


def model_file_lines(changed: Mapping[str, str]) -> list[str]:
    """The model-file lines that make a variant's settings the base model's."""
    out = []
    for setting, value in changed.items():
        if setting in _SECTION:
            out.append(f"[{_SECTION[setting]}] {setting} = {_toml_value(setting, value)}")
        elif setting.startswith("role:"):
            out.append(f'[[model.regressors]] name = "{setting[5:]}": role = "{value}"')
        elif setting == "outcome_lags":
            out.append(f"[model] outcome_lags = {value}")
        elif setting.startswith("lags:"):
            out.append(f'[[model.regressors]] name = "{setting[5:]}": lags = {value}')
        elif setting.startswith("instrument_lags:"):
            name = setting[len("instrument_lags:"):]
            out.append(f'the instrument_lags of {name} = {value} ([model] for the outcome, '
                       f'its [[model.regressors]] or [[instruments.gmm]] table otherwise)')
        elif setting == "drop":
            out.append(f"remove the [[model.regressors]] of {value}")
        elif setting == "sample":
            out.append(f'[sample] the restrictions of the sample "{value}" '
                       "(from [[audit.vary.sample]])")
        else:
            out.append(f"{setting} = {value}")
    return out


def closest_acceptable(variants, flags, estimates, spec, base_pos, settings,
                       judged_classes) -> dict | None:
    """The acceptable variant with the fewest settings changed from the base model
    (ties: fewest instruments, then plan order), with its estimates of the focus terms
    and the model-file lines that would make it the base."""
    ok = np.isin(flags["evidence"].to_numpy(), list(judged_classes)) & (
        flags["duplicate_of"].to_numpy() == "")
    if not ok.any():
        return None
    base = variants.iloc[base_pos]
    cand = []
    for pos in np.flatnonzero(ok):
        row = variants.iloc[pos]
        changed = {c: value_text(row[c]) for c in settings
                   if value_text(row[c]) != value_text(base[c])}
        inst = _num(row.get("instruments"))
        cand.append((len(changed), inst if math.isfinite(inst) else math.inf, pos, changed))
    n, _, pos, changed = min(cand, key=lambda c: (c[0], c[1], c[2]))
    vid = str(variants["variant"].iloc[pos])
    est = estimates[estimates["variant"].astype(str) == vid]
    focus = spec.focus_terms()
    return _clean({"variant": vid, "changed": changed, "settings_changed": n,
                   "instruments": variants.iloc[pos].get("instruments"),
                   "estimates": {t: float(e) for t, e in zip(est["term"], est["estimate"])
                                 if t in focus},
                   "std_errors": {t: float(e) for t, e in zip(est["term"], est["std_error"])
                                  if t in focus},
                   "model_file_lines": model_file_lines(changed)})
