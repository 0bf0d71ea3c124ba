"""What every figure shares: the palette, marker sizes, axis styling, variant ticks."""
from __future__ import annotations

import numpy as np
import pandas as pd
from matplotlib.lines import Line2D
from scipy.stats import norm

from ..inputs import AuditFolder
from ..labels import mathtext_safe, value_text

# Okabe-Ito palette
BLACK = "#000000"
ORANGE = "#E69F00"
SKY = "#56B4E9"
GREEN = "#009E73"
YELLOW = "#F0E442"
BLUE = "#0072B2"
VERMILLION = "#D55E00"
PURPLE = "#CC79A7"
GREY = "#8C8C8C"
LIGHT = "#E8E8E8"

GROUP_COLOURS = (BLUE, ORANGE, GREEN, PURPLE, SKY, VERMILLION, BLACK)
GROUP_MARKERS = ("o", "^", "s", "D", "v", "P", "X")

MAX_TICK_LABELS = 40  # above this many variants, no per-variant tick labels

def style(ax) -> None:
    ax.spines["top"].set_visible(False)
    ax.spines["right"].set_visible(False)
    ax.tick_params(labelsize=8)


def sizes(n: int) -> tuple[float, float]:
    """Marker area and line width that stay legible from 1 to several hundred marks."""
    return float(np.clip(2400.0 / max(n, 1), 4.0, 36.0)), float(np.clip(150.0 / max(n, 1), 0.5, 2.0))


def variant_ticks(ax, ids, n_limit=MAX_TICK_LABELS, what="variants") -> None:
    n = len(ids)
    if 0 < n <= n_limit:
        ax.set_xticks(np.arange(n))
        ax.set_xticklabels([mathtext_safe(i) for i in ids], rotation=90, fontsize=7)
    else:
        ax.set_xticks([])
    ax.set_xlabel(f"{n} {what}" if n != 1 else f"1 {what[:-1] if what.endswith('s') else what}",
                  fontsize=8)


def no_data(ax, text: str):
    ax.text(0.5, 0.5, mathtext_safe(text), ha="center", va="center", transform=ax.transAxes,
            fontsize=9, color=GREY)
    ax.set_xticks([])
    ax.set_yticks([])
    return ax


def critical(alpha: float) -> float:
    return float(norm.ppf(1.0 - alpha / 2.0))


def sorted_term(audit: AuditFolder, term: str) -> pd.DataFrame:
    frame = audit.term_estimates(term)
    # stable order: estimate, then variant id (ties are common with identical fits)
    return frame.sort_values(["estimate", "variant"], kind="mergesort").reset_index(drop=True)


def choice_rows(audit: AuditFolder, frame: pd.DataFrame):
    """(setting column, value) pairs shown in the choice panel, in a fixed order."""
    # settings that vary among the variants drawn (a value used only by skipped or
    # failed variants would be an empty row)
    columns = [c for c in audit.setting_columns if c in frame.columns]
    varied = [c for c in columns if frame[c].map(value_text).nunique() > 1]
    rows = []
    for col in varied or columns:
        drawn = set(frame[col].map(value_text))
        # values in the order of variants.csv (base first), whatever the sorting
        for value in pd.unique(audit.variants[col]):
            if value_text(value) in drawn:
                rows.append((col, value))
    return rows


def same(series: pd.Series, value) -> np.ndarray:
    return (series.map(value_text) == value_text(value)).to_numpy()


def mark_base_and_truth(ax, handles, audit, term, frame, x, est, area, truth_style):
    """Ring the base model's estimate and draw the true value when it is known;
    returns the base model's positions."""
    base = np.flatnonzero(frame["variant"].to_numpy() == audit.base_variant)
    if base.size:
        ax.scatter(x[base], est[base], s=area * 3 + 30, facecolors="none",
                   edgecolors=VERMILLION, linewidths=1.6, zorder=4)
        handles.append(Line2D([], [], color=VERMILLION, marker="o", markerfacecolor="none",
                              linestyle="none", label="base model"))
    truth = audit.truth_value(term)
    if truth is not None:
        ax.axhline(truth, color=GREEN, linestyle=truth_style, linewidth=1.2)
        handles.append(Line2D([], [], color=GREEN, linestyle=truth_style,
                              label=f"true value {truth:g}"))
    return base


