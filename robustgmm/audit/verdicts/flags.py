"""Per-variant rules: the evidence class of each variant and the duplicate search."""
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
from .rules import DUPLICATE_TOLERANCE, REJECTION_RULES, VARIANT_RULES


def _column(variants: pd.DataFrame, name: str) -> np.ndarray:
    if name not in variants:
        return np.full(len(variants), np.nan)
    return pd.to_numeric(variants[name], errors="coerce").to_numpy(dtype=float)


# ---------------------------------------------------------------------------
# variant rules and evidence classes
# ---------------------------------------------------------------------------
def _is_system(variants: pd.DataFrame, spec: Spec) -> np.ndarray:
    if "equations" in variants:
        return variants["equations"].astype(str).eq("system").to_numpy()
    return np.full(len(variants), str(spec.equations) == "system")


def variant_flags(variants: pd.DataFrame, thresholds: Mapping[str, Any],
                  spec: Spec | None = None) -> pd.DataFrame:
    """One boolean column per variant rule (a missing test does not fire) plus
    ``evidence`` and ``acceptable``; rows follow ``variants``. ``duplicate_estimate``
    is filled by :func:`evaluate` (it needs the estimates)."""
    status = variants["status"].astype(str).to_numpy()
    ok = status == "ok"
    hansen, ar2, dh = (_column(variants, c) for c in ("hansen_p", "ar2_p", "diff_hansen_level_p"))
    instr, units = _column(variants, "instruments"), _column(variants, "units")
    system = _is_system(variants, spec) if spec is not None else np.isfinite(dh)
    with np.errstate(invalid="ignore", divide="ignore"):
        per_unit = np.where(units > 0, instr / units, np.nan)
        near_one = hansen >= thresholds["hansen_near_one"]
        flags = pd.DataFrame({
            "hansen_rejects": ok & (hansen < thresholds["hansen_reject"]),
            "ar2_rejects": ok & (ar2 < thresholds["ar2_reject"]),
            "difference_hansen_level_rejects": ok & (dh < thresholds["difference_hansen_reject"]),
            "hansen_p_high": ok & (((hansen >= thresholds["hansen_too_high"])
                                    & (per_unit >= thresholds["instruments_per_unit_warn"]))
                                   | near_one),
            "hansen_p_near_one": ok & near_one,
            "instruments_exceed_units": ok & (per_unit > thresholds["instruments_per_unit"]),
            # a rank test that is not valid has no p-value and does not fire
            "underidentified": ok & (_column(variants, "underid_p") >= thresholds["alpha"]),
            "weak_instruments": ok & (_column(variants, "weak_f_min") < thresholds["weak_f"]),
        }, index=variants.index)
    rejected = flags[list(REJECTION_RULES)].any(axis=1).to_numpy()
    missing = ~np.isfinite(hansen) | ~np.isfinite(ar2) | (system & ~np.isfinite(dh))
    flags["tests_unavailable"] = ok & ~rejected & missing
    flags["duplicate_estimate"] = False
    flags["unreliable_at_this_size"] = False  # filled by evaluate() from a simulation
    flags = flags[list(VARIANT_RULES)]
    evidence = np.where(status == "failed", Evidence.FAILED.value, Evidence.SKIPPED.value)
    evidence = np.where(ok & rejected, Evidence.REJECTED.value, evidence)
    evidence = np.where(ok & ~rejected & missing, Evidence.UNTESTABLE.value, evidence)
    evidence = np.where(ok & ~rejected & ~missing, Evidence.ACCEPTABLE.value, evidence)
    flags["evidence"] = evidence
    flags["acceptable"] = evidence == Evidence.ACCEPTABLE.value
    return flags


def find_duplicates(variants: pd.DataFrame, estimates: pd.DataFrame,
                    tol: float = DUPLICATE_TOLERANCE) -> dict[str, str]:
    """``{variant: first earlier variant with the same estimates}`` among the ok
    variants, in the order of ``variants``: the same terms, every estimate equal to
    ``tol`` relative to max(1, |b|)."""
    ok_ids = variants.loc[variants["status"].astype(str).eq("ok"), "variant"].astype(str)
    if estimates.empty or ok_ids.empty:
        return {}
    est = estimates.assign(variant=estimates["variant"].astype(str))
    wide = est.pivot_table(index="variant", columns="term", values="estimate", aggfunc="first")
    wide = wide.reindex([i for i in ok_ids if i in wide.index])
    out: dict[str, str] = {}
    reps: list[tuple[str, np.ndarray, np.ndarray]] = []  # (id, values, finite mask)
    for vid, row in zip(wide.index, wide.to_numpy(dtype=float)):
        finite = np.isfinite(row)
        twin = None
        for rid, rvals, rfin in reps:
            if np.array_equal(rfin, finite) and finite.any() and np.all(
                    np.abs(rvals[finite] - row[finite])
                    <= tol * np.maximum(1.0, np.abs(row[finite]))):
                twin = rid
                break
        if twin is None:
            reps.append((vid, row, finite))
        else:
            out[vid] = twin
    return out
