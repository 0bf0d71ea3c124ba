"""Figure 2: the Hansen p-value of every variant against its number of instruments."""
from __future__ import annotations

import numpy as np
import pandas as pd

from ..labels import mathtext_safe, value_text
from ..inputs import AuditFolder
from .common import (BLACK, BLUE, GREEN, GREY, GROUP_COLOURS, GROUP_MARKERS, LIGHT,
                     MAX_TICK_LABELS, ORANGE, PURPLE, SKY, VERMILLION, YELLOW,
                     choice_rows, critical, mark_base_and_truth, no_data, same, sizes,
                     sorted_term, style, variant_ticks)


def _group_columns(frame: pd.DataFrame) -> list[str]:
    return [c for c in ("equations", "form") if c in frame.columns]


def plot_hansen_drift(ax, audit: AuditFolder):
    """Hansen J p-value of every estimated variant against its instrument count.

    Groups (colour = equations, shape = instrument form). Horizontal lines: the
    rejection level (Hansen 1982) and the high-p warning line (0.25 by default,
    common practice; Roodman 2009 shows that many instruments push the p-value
    toward 1). Vertical line: instruments = units (common practice: instruments
    should not outnumber units)."""
    style(ax)
    ax.set_title("Hansen test p-value against instrument count", fontsize=10, loc="left")
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
    handles = []
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
            ax.scatter(frame["instruments"].to_numpy(float)[mask],
                       frame["hansen_p"].to_numpy(float)[mask], s=area, c=colour,
                       marker=marker, alpha=0.8, linewidths=0, label=label, zorder=3)
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
    units_series = audit.ok_variants["units"].dropna()
    if not units_series.empty:
        units = float(audit.base_row()["units"]) if np.isfinite(audit.base_row()["units"]) \
            else float(units_series.max())
        limit = units * audit.thresholds["instruments_per_unit"]
        ax.axvline(limit, color=GREY, linestyle="-.", linewidth=1,
                   label=f"instruments = units ({limit:g})")
    ax.set_ylim(-0.03, 1.05)
    ax.set_xlim(left=0)
    ax.set_xlabel("number of instruments", fontsize=8)
    ax.set_ylabel("Hansen J p-value", fontsize=8)
    ax.legend(fontsize=7, frameon=False, loc="center left", bbox_to_anchor=(1.01, 0.5))
    return ax

