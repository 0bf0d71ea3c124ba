"""Figure 2: the Hansen p-value of every variant against its number of instruments."""
from __future__ import annotations

import numpy as np
import pandas as pd

from ..inputs import AuditFolder
from ..labels import mathtext_safe, value_text
from .common import (GREY, GROUP_COLOURS, GROUP_MARKERS, ORANGE, VERMILLION, attach_tooltips,
                     no_data, sizes, style, variant_tooltips)


def _group_columns(frame: pd.DataFrame) -> list[str]:
    return [c for c in ("equations", "form") if c in frame.columns]


def instrument_range(counts: np.ndarray) -> tuple[float, float]:
    """x limits that fit the variants' instrument counts (with a 6% margin); they
    start at zero only when the smallest count is near zero."""
    lo, hi = float(np.min(counts)), float(np.max(counts))
    span = max(hi - lo, 1.0)
    left = 0.0 if lo <= 0.25 * span else lo - 0.06 * span
    return left, hi + 0.06 * span


def plot_hansen_drift(ax, audit: AuditFolder):
    """Hansen J p-value (Hansen 1982) of each estimated variant against its
    instrument count. Too many instruments weaken the test and push p toward 1
    (Roodman 2009, "A note on the theme of too many instruments", Oxford Bulletin of
    Economics and Statistics 71, 135-158).

    Groups (colour = equations, shape = instrument form). Horizontal lines: the
    rejection level (Hansen 1982) and the high-p warning line (0.25 by default,
    common practice; Roodman 2009 shows that many instruments push the p-value
    toward 1). The x range fits the variants; instruments = units (common practice:
    instruments should not outnumber units) is a vertical line when it falls in that
    range, else a note at the edge, and the top axis gives instruments per unit."""
    style(ax)
    ax.set_title("Hansen test p-value against instrument count", fontsize=10, loc="left", pad=28)
    frame = audit.ok_variants
    frame = frame[np.isfinite(frame["hansen_p"].to_numpy(float))
                  & np.isfinite(frame["instruments"].to_numpy(float))]
    if frame.empty:
        return no_data(ax, "no estimated variant reports a Hansen test")
    area, _ = sizes(len(frame))
    area = max(area, 10.0)
    groups = _group_columns(frame)
    colour_keys = list(pd.unique(frame[groups[0]].map(value_text))) if groups else [""]
    marker_keys = list(pd.unique(frame[groups[1]].map(value_text))) if len(groups) > 1 else [""]
    for ci, ck in enumerate(colour_keys):
        for mi, mk in enumerate(marker_keys):
            mask = np.ones(len(frame), bool)
            if groups:
                mask &= frame[groups[0]].map(value_text).to_numpy() == ck
            if len(groups) > 1:
                mask &= frame[groups[1]].map(value_text).to_numpy() == mk
            if not mask.any():
                continue
            colour = GROUP_COLOURS[ci % len(GROUP_COLOURS)]
            marker = GROUP_MARKERS[mi % len(GROUP_MARKERS)]
            label = mathtext_safe(", ".join(k for k in (ck, mk) if k) or "variants")
            marks = ax.scatter(frame["instruments"].to_numpy(float)[mask],
                               frame["hansen_p"].to_numpy(float)[mask], s=area, c=colour,
                               marker=marker, alpha=0.8, linewidths=0,
                               label=f"{label} ({int(mask.sum())})", zorder=3)
            attach_tooltips(ax, marks, variant_tooltips(audit, frame[mask], "hansen_p", None))
    base = frame[frame["variant"] == audit.base_variant]
    if not base.empty:
        ax.scatter(base["instruments"], base["hansen_p"], s=area * 3 + 40, facecolors="none",
                   edgecolors=VERMILLION, linewidths=1.6, zorder=4, label="base model")
    reject = audit.thresholds["hansen_reject"]
    high = audit.thresholds["hansen_too_high"]
    ax.axhline(reject, color=VERMILLION, linestyle="--", linewidth=1,
               label=f"p = {reject:g}: rejects")
    ax.axhline(high, color=ORANGE, linestyle=":", linewidth=1.4,
               label=f"p = {high:g}: warning line")
    left, right = instrument_range(frame["instruments"].to_numpy(float))
    ax.set_xlim(left, right)
    units_series = audit.ok_variants["units"].dropna()
    if not units_series.empty:
        units = float(audit.base_row()["units"]) if np.isfinite(audit.base_row()["units"]) \
            else float(units_series.max())
        limit = units * audit.thresholds["instruments_per_unit"]
        if left <= limit <= right:
            ax.axvline(limit, color=GREY, linestyle="-.", linewidth=1,
                       label=f"instruments = units ({limit:g})")
        else:
            side = "right" if limit > right else "left"
            ax.text(0.99 if side == "right" else 0.01, 0.5,
                    f"instruments = units at {limit:g}\n(off the {side} edge)",
                    transform=ax.transAxes, ha=side, va="center", fontsize=7, color=GREY)
        if units > 0:
            top = ax.secondary_xaxis("top", functions=(lambda v: v / units, lambda r: r * units))
            top.set_xlabel(f"instruments per unit ({units:g} units)", fontsize=7)
            top.tick_params(labelsize=7)
    ax.set_ylim(-0.03, 1.05)
    ax.set_xlabel("number of instruments", fontsize=8)
    ax.set_ylabel("Hansen J p-value", fontsize=8)
    ax.legend(fontsize=7, frameon=False, loc="center left", bbox_to_anchor=(1.01, 0.5))
    return ax
