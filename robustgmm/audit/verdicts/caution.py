"""Model-level caution rules and the diagnostics summary of the verdict record."""
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
from .rules import RULES, VARIANT_RULES, _fired
from .flags import _column


def _diagnostics(variants, flags, th) -> dict:
    """Ranges and counts of the specification tests over the estimated variants, with
    the number of variants each variant rule fired for (every document reads these)."""
    ok = variants["status"].astype(str).eq("ok").to_numpy()
    out: dict[str, Any] = {}
    for col in ("hansen_p", "ar2_p", "diff_hansen_level_p", "instruments", "units",
                "instruments_per_unit"):
        if col == "instruments_per_unit":
            x = _column(variants, "instruments") / _column(variants, "units")
        else:
            x = _column(variants, col)
        x = x[ok]
        f = x[np.isfinite(x)]
        out[col] = {"available": int(f.size), "min": float(f.min()) if f.size else None,
                    "max": float(f.max()) if f.size else None}
    out["rule_counts"] = {r: int(flags[r].to_numpy()[ok].sum()) for r in VARIANT_RULES}
    out["ok"] = int(ok.sum())
    return out


def _model_flags(variants, flags, th, base_pos, ids, unreliable=None) -> tuple[Firing, ...]:
    out = []
    ok = variants["status"].astype(str).eq("ok").to_numpy()
    n_ok = int(ok.sum())
    value_col = {"hansen_rejects": "hansen_p", "ar2_rejects": "ar2_p",
                 "difference_hansen_level_rejects": "diff_hansen_level_p",
                 "hansen_p_high": "hansen_p", "hansen_p_near_one": "hansen_p",
                 "instruments_exceed_units": "instruments_per_unit",
                 "tests_unavailable": None, "duplicate_estimate": None,
                 "underidentified": "underid_p", "weak_instruments": "weak_f_min",
                 "unreliable_at_this_size": None}
    for rule in RULES:
        if rule.level != "variant":
            continue
        hit = flags[rule.id].to_numpy(bool)
        if not hit.any():
            continue
        col = value_col[rule.id]
        fig = {"variants": int(hit.sum()), "of_ok": n_ok,
               "share": hit.sum() / n_ok if n_ok else None,
               "ids": [str(i) for i in ids[hit]],
               "base": bool(hit[base_pos]) if base_pos is not None else None}
        if col is not None:
            vals = (_column(variants, "instruments") / _column(variants, "units")
                    if col == "instruments_per_unit" else _column(variants, col))
            avail = ok & np.isfinite(vals)
            fig["of_available"] = int(avail.sum())
            fig["base_value"] = vals[base_pos] if base_pos is not None else None
            fig["range"] = [float(np.nanmin(vals[hit])), float(np.nanmax(vals[hit]))]
        if rule.id == "unreliable_at_this_size":
            fig["terms"] = {vid: items for vid, items in (unreliable or {}).items()}
        if rule.id == "duplicate_estimate":
            fig["pairs"] = {str(i): str(d) for i, d in zip(ids[hit], flags["duplicate_of"].to_numpy()[hit])}
        out.append(_fired(rule.id, th, fig))
    failed = variants["status"].astype(str).eq("failed").to_numpy()
    if failed.any():
        out.append(Firing("variants_failed", "variants that could not be estimated", "robustgmm",
                          None, None, Effect.INFORMATION,
                          _clean({"variants": int(failed.sum()),
                                  "ids": [str(i) for i in ids[failed]],
                                  "reasons": sorted(set(variants["reason"][failed].astype(str)))})))
    return tuple(out)
