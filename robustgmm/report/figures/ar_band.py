"""Figure 3: the autoregressive coefficient of every variant against the within-OLS band."""
from __future__ import annotations

import numpy as np
from matplotlib.lines import Line2D
from matplotlib.patches import Patch

from ..labels import band_arrays, mathtext_safe
from ..inputs import AuditFolder
from .common import (BLACK, BLUE, GREEN, GREY, GROUP_COLOURS, GROUP_MARKERS, LIGHT,
                     MAX_TICK_LABELS, ORANGE, PURPLE, SKY, VERMILLION, YELLOW,
                     choice_rows, critical, mark_base_and_truth, no_data, same, sizes,
                     sorted_term, style, variant_ticks)


def plot_ar_band(ax, audit: AuditFolder, term: str, *, max_tick_labels: int = MAX_TICK_LABELS):
    """The autoregressive coefficient ``term`` in every estimated variant (sorted,
    with confidence intervals) against the band between the within (FE) estimate,
    biased down (Nickell 1981), and the pooled OLS estimate, biased up; a credible
    estimate lies between them (Bond, Hoeffler & Temple 2001; Bond 2002)."""
    style(ax)
    ax.set_title(mathtext_safe(f"Autoregressive coefficient {term} against the within-OLS band"),
                 fontsize=10, loc="left")
    frame = sorted_term(audit, term)
    n = len(frame)
    if n == 0:
        return no_data(ax, f"no estimated variant has a value for {term}")
    x = np.arange(n)
    est = frame["estimate"].to_numpy(float)
    se = frame["std_error"].to_numpy(float)
    z = critical(audit.alpha)
    area, width = sizes(n)
    band = band_arrays(audit, term, frame)
    handles = []
    if band is not None:
        lo = np.minimum(band[0], band[1])
        hi = np.maximum(band[0], band[1])
        xs = np.concatenate([[x[0] - 0.5], x, [x[-1] + 0.5]])
        lo_s = np.concatenate([[lo[0]], lo, [lo[-1]]])
        hi_s = np.concatenate([[hi[0]], hi, [hi[-1]]])
        ax.fill_between(xs, lo_s, hi_s, step="mid", color=SKY, alpha=0.25, linewidth=0)
        ax.step(xs, band[0][np.r_[0, np.arange(n), n - 1]], where="mid", color=BLUE,
                linestyle="--", linewidth=1)
        ax.step(xs, band[1][np.r_[0, np.arange(n), n - 1]], where="mid", color=ORANGE,
                linestyle="--", linewidth=1)
        inside = (est >= lo) & (est <= hi)
        handles += [Patch(facecolor=SKY, alpha=0.4, label="between within and OLS"),
                    Line2D([], [], color=BLUE, linestyle="--", label="within (FE), biased down"),
                    Line2D([], [], color=ORANGE, linestyle="--", label="pooled OLS, biased up")]
    else:
        inside = np.ones(n, bool)
    colours = np.where(inside, BLACK, VERMILLION)
    ax.vlines(x, est - z * se, est + z * se, colors=colours, linewidth=width, alpha=0.6)
    ax.scatter(x, est, s=area, c=colours, linewidths=0, zorder=3)
    handles += [Line2D([], [], color=BLACK, marker="o", linestyle="none", markersize=4,
                       label="inside the band")]
    if band is not None and not inside.all():
        handles.append(Line2D([], [], color=VERMILLION, marker="o", linestyle="none",
                              markersize=4, label="outside the band"))
    mark_base_and_truth(ax, handles, audit, term, frame, x, est, area, truth_style="-.")
    ax.set_xlim(-0.5 - 0.01 * n, n - 0.5 + 0.01 * n)
    ax.set_ylabel(f"estimate, {100 * (1 - audit.alpha):g}% CI", fontsize=8)
    variant_ticks(ax, frame["variant"], max_tick_labels, "variants, sorted by estimate")
    ax.legend(handles=handles, fontsize=7, frameon=False, loc="center left",
              bbox_to_anchor=(1.01, 0.5))
    return ax

