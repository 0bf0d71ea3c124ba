"""The rule ``few_units_flip``: does dropping a handful of units overturn a conclusion?

Reads the rows of ``influence.csv`` (:mod:`robustgmm.audit.dropping`; every set was
refitted exactly). For a model whose estimate of the term is significant at alpha
the conclusion is its sign and its significance: the targets ``sign`` and
``significance`` (lost) count. For a model whose estimate is not significant the
conclusion is "no significant effect": only ``significance`` (gained) counts — the
sign of an insignificant estimate is no conclusion. The rule fires when a set of at
most ``flip_share`` of the model's units reaches a counted target:

* in the base model: **fragile** (Broderick, Giordano & Meager 2020 show that
  dropping under 1% of the sample overturns published conclusions; the 1% line is a
  robustgmm default);
* only in some other analysed (judged) variants (``[audit] influence = "all"``): a
  **caution**, beside the verdict.

The figures name the smallest such set (units, share, ids, the exact refit), so
every document words the same numbers.
"""
from __future__ import annotations

import math
from typing import Any

import numpy as np
import pandas as pd

from ...options import DropTarget, Effect
from ..records import BaseEstimate, Firing
from .rules import _fired

#: Shares are compared with this relative slack (``4/400`` must count as ``0.01``).
_SLACK = 1e-9


def counted_targets(significant: bool) -> tuple[str, ...]:
    """The targets that overturn a conclusion (module docstring)."""
    return ((DropTarget.SIGN.value, DropTarget.SIGNIFICANCE.value) if significant
            else (DropTarget.SIGNIFICANCE.value,))


def _hits(rows: pd.DataFrame, significant: bool, flip_share: float) -> pd.DataFrame:
    """Reached rows of counted targets within ``flip_share``, smallest set first
    (significance before sign on a tie: it is the conclusion a reader quotes)."""
    reached = rows["reached"].astype("boolean").fillna(False).to_numpy(bool)
    share = pd.to_numeric(rows["share_dropped"], errors="coerce").to_numpy(float)
    ok = (reached & rows["target"].isin(counted_targets(significant)).to_numpy()
          & (share <= flip_share * (1 + _SLACK)))
    out = rows[ok].copy()
    out["_order"] = out["target"].map({DropTarget.SIGNIFICANCE.value: 0,
                                       DropTarget.SIGN.value: 1}).fillna(2)
    return out.sort_values(["units_dropped", "_order"], kind="mergesort")


def _figures(row: pd.Series, significant: bool, n_units: int | None) -> dict[str, Any]:
    k = int(row["units_dropped"])
    return {"target": str(row["target"]), "units_dropped": k,
            "share_dropped": float(row["share_dropped"]),
            # the search's own count (k / share) first: variants.csv counts the same
            # units, and is the fallback
            "units": (int(round(k / float(row["share_dropped"])))
                      if k and float(row["share_dropped"]) > 0 else n_units),
            "dropped_units": str(row["dropped_units"] or "").split(),
            "estimate": float(row["estimate"]), "std_error": float(row["std_error"]),
            "p_value": float(row["p_value"]), "base_significant": bool(significant)}


def evaluate_term(term: str, base: BaseEstimate | None, c) -> tuple[Firing | None, str, dict]:
    """``(firing or None, outcome, figures)`` for ``term``; outcome is ``fired``,
    ``passed`` or ``not_evaluated`` (no dropping analysis, or the base not estimated)."""
    frame = getattr(c, "influence", None)
    if frame is None or base is None or c.base_id is None:
        return None, "not_evaluated", {}
    rows = frame[frame["term"] == term]
    if rows.empty:
        return None, "not_evaluated", {}
    flip = float(c.th["flip_share"])
    sig_of = _significance(c, term)
    base_rows = rows[rows["variant"].astype(str) == c.base_id]
    summary: dict[str, Any] = {"flip_share": flip}
    base_hit = None
    if len(base_rows):
        hits = _hits(base_rows, base.significant, flip)
        if len(hits):
            base_hit = _figures(hits.iloc[0], base.significant, _units(c, c.base_id))
        summary["base_smallest"] = _smallest(base_rows, base.significant, _units(c, c.base_id))
    others = []
    analysed = [v for v in dict.fromkeys(rows["variant"].astype(str)) if v != c.base_id]
    for vid in analysed:
        sig = sig_of.get(vid)
        if sig is None:
            continue
        hits = _hits(rows[rows["variant"].astype(str) == vid], sig, flip)
        if len(hits):
            others.append({"variant": vid, **_figures(hits.iloc[0], sig, _units(c, vid))})
    summary["variants_analysed"] = len(analysed)
    summary["variants_flipped"] = [o["variant"] for o in others]
    if base_hit is not None:
        fig = {"scope": "base", **base_hit, "variants_analysed": len(analysed),
               "variants_flipped": summary["variants_flipped"]}
        return _fired("few_units_flip", c.th, fig), "fired", summary
    if others:
        best = min(others, key=lambda o: o["units_dropped"])
        fig = {"scope": "variants", **best, "variants_analysed": len(analysed),
               "variants_flipped": summary["variants_flipped"]}
        firing = _fired("few_units_flip", c.th, fig)
        return _as_caution(firing), "fired", summary
    return None, "passed", summary


def _as_caution(f: Firing) -> Firing:
    return Firing(f.id, f.description, f.source, f.threshold_name, f.threshold,
                  Effect.CAUTION, f.figures)


def _smallest(rows: pd.DataFrame, significant: bool, n_units: int | None) -> dict | None:
    """The smallest reached set of a counted target at any share (None: not reached
    within max_drop_share)."""
    hits = _hits(rows, significant, math.inf)
    if hits.empty:
        return None
    return _figures(hits.iloc[0], significant, n_units)


def _significance(c, term: str) -> dict[str, bool]:
    est = c.estimates[c.estimates["term"] == term]
    p = pd.to_numeric(est["p_value"], errors="coerce").to_numpy(float)
    return {str(v): bool(np.isfinite(x) and x < c.alpha)
            for v, x in zip(est["variant"].astype(str), p)}


def _units(c, vid: str) -> int | None:
    """The units of a variant's estimation sample (variants.csv ``units``)."""
    rows = c.variants[c.variants["variant"].astype(str) == vid]
    if rows.empty:
        return None
    n = pd.to_numeric(rows["units"], errors="coerce").iloc[0]
    return int(n) if np.isfinite(n) else None


def unit_noun(spec) -> str:
    """How sentences name the units: the ``[labels]`` entry of the unit column
    (``bakery = "bakeries"``), else "units"."""
    return dict(spec.labels).get(spec.unit, "units")


def units_text(k: int, n: int | None, noun: str = "units") -> str:
    """``4 of 400 bakeries (1.0%)``."""
    if n:
        return f"{k} of {n:,} {noun} ({100 * k / n:.1f}%)"
    return f"{k} {noun}"


def flip_phrase(fig: dict, term_text: str | None = None, noun: str = "units") -> str:
    """The plain sentence of a firing: ``dropping 4 of 400 bakeries (1.0%) makes the
    effect of staff hours insignificant`` (``term_text`` None: "makes it
    insignificant", for the verdict's reason, which belongs to one term already)."""
    lead = f"dropping {units_text(int(fig['units_dropped']), fig.get('units'), noun)}"
    if fig["target"] == DropTarget.SIGN.value:
        return (f"{lead} reverses its sign" if term_text is None
                else f"{lead} reverses the sign of the effect of {term_text}")
    what = "insignificant" if fig["base_significant"] else "significant"
    return (f"{lead} makes it {what}" if term_text is None
            else f"{lead} makes the effect of {term_text} {what}")
