"""The greedy dropping path of a focus term: the estimate as the most influential
units are dropped one at a time, each step an exact refit (influence_path.csv;
Huang, Burt, Shen, Nguyen & Broderick 2024).

x: units dropped; y: the estimate with its 1 − alpha interval (estimate ± z·se, the
refit's own standard error). Marked: zero, the significance boundary ``±z·se`` on
the base estimate's side (the estimate is significant while it lies beyond it), and
the ``flip_share`` line of the rule ``few_units_flip``. The base model is drawn in
colour, up to :data:`MAX_OTHERS` other analysed variants in grey. The path drawn is
the search against the base model's conclusion: towards the opposite sign when the
base estimate is significant (``sign``), towards significance when it is not
(``significance``; the boundary then on the side the path ends).
"""
from __future__ import annotations

import numpy as np
import pandas as pd
from matplotlib.ticker import MaxNLocator

from ..labels import mathtext_safe
from .common import BLACK, BLUE, GREY, LIGHT, VERMILLION, critical, no_data, style

#: Other analysed variants drawn beside the base model (thin grey lines).
MAX_OTHERS = 4


def path_target(path: pd.DataFrame, variant: str, term: str, alpha: float) -> str:
    """``sign`` when the model's estimate (step 0) is significant, else ``significance``."""
    rows = path[(path["variant"].astype(str) == variant) & (path["term"] == term)
                & (path["dropped"] == 0)]
    p0 = float(rows["p_value"].iloc[0]) if len(rows) else np.nan
    return "sign" if (np.isfinite(p0) and p0 < alpha) else "significance"


def path_rows(path: pd.DataFrame, variant: str, term: str, alpha: float = 0.05) -> pd.DataFrame:
    target = path_target(path, variant, term, alpha)
    rows = path[(path["variant"].astype(str) == variant) & (path["term"] == term)
                & (path["target"] == target)]
    return rows.sort_values("dropped", kind="mergesort")


def plot_dropping_path(ax, path: pd.DataFrame, term: str, base: str, others, alpha: float,
                       flip_units: float | None = None, label: str | None = None,
                       noun: str = "units"):
    """Draw the path of ``term`` (module docstring) on ``ax``."""
    z = critical(alpha)
    rows = path_rows(path, base, term, alpha)
    if rows.empty:
        return no_data(ax, f"no dropping path for {term}")
    for vid in list(others)[:MAX_OTHERS]:
        o = path_rows(path, vid, term, alpha)
        if len(o):
            ax.plot(o["dropped"], o["estimate"], color=GREY, lw=0.8, alpha=0.8,
                    label="other acceptable variants" if vid == others[0] else None)
    x = rows["dropped"].to_numpy(float)
    b = rows["estimate"].to_numpy(float)
    se = rows["std_error"].to_numpy(float)
    significant = path_target(path, base, term, alpha) == "sign"
    ref = b[0] if significant else b[-1]
    sign = 1.0 if ref >= 0 else -1.0
    ax.fill_between(x, b - z * se, b + z * se, color=LIGHT, step=None,
                    label=f"{1 - alpha:.0%} interval")
    ax.plot(x, b, color=BLUE, lw=1.5, marker="o", ms=3, label="base model (exact refits)")
    ax.plot(x, sign * z * se, color=VERMILLION, lw=1.0, ls="--",
            label=f"significance boundary ({z:.2f} se)")
    ax.axhline(0.0, color=BLACK, lw=0.8)
    if flip_units is not None and flip_units > 0:
        ax.axvline(flip_units, color=GREY, lw=0.8, ls=":", label="flip_share")
    ax.set_xlabel(f"{noun} dropped (most influential first, refitted at every step)",
                  fontsize=8)
    ax.set_ylabel(mathtext_safe(label or term), fontsize=8)
    ax.legend(fontsize=7, loc="best", frameon=False)
    style(ax)
    # units are counted: no tick at 2.5 units
    ax.xaxis.set_major_locator(MaxNLocator(integer=True))
    return ax
