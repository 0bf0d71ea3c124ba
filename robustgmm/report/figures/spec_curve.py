"""Figure 1: the specification curve of one focus term (Simonsohn, Simmons & Nelson 2020)."""
from __future__ import annotations

import numpy as np
from matplotlib.colors import to_rgba
from matplotlib.figure import Figure
from matplotlib.lines import Line2D

from ..labels import mathtext_safe, setting_name, value_text
from ..inputs import AuditFolder
from .common import (BLACK, BLUE, GREEN, GREY, GROUP_COLOURS, GROUP_MARKERS, LIGHT,
                     MAX_TICK_LABELS, ORANGE, PURPLE, SKY, VERMILLION, YELLOW,
                     choice_rows, critical, mark_base_and_truth, no_data, same, sizes,
                     sorted_term, style, variant_ticks)


def plot_specification_curve(fig: Figure, audit: AuditFolder, term: str, *,
                             max_tick_labels: int = MAX_TICK_LABELS) -> Figure:
    """Sorted estimates of ``term`` with (1 - alpha) confidence intervals (estimate
    ± z·se, normal critical value) over every estimated variant, the base model
    ringed, zero and (when known) the true value as lines; underneath, one row per
    setting value with a mark for each variant that uses it.

    Specification curve: Simonsohn, Simmons & Nelson (2020), Nature Human
    Behaviour 4, 1208-1214."""
    frame = sorted_term(audit, term)
    rows = choice_rows(audit, frame)
    n = len(frame)
    grid = fig.add_gridspec(2, 1, height_ratios=[3.0, max(1.0, 0.28 * len(rows))], hspace=0.08)
    ax = fig.add_subplot(grid[0])
    ax_choice = fig.add_subplot(grid[1], sharex=ax)
    style(ax)
    style(ax_choice)
    ax.set_title(mathtext_safe(f"Specification curve: {term}"), fontsize=10, loc="left", pad=20)
    if n == 0:
        no_data(ax, f"no estimated variant has a value for {term}")
        no_data(ax_choice, "")
        return fig

    x = np.arange(n)
    est = frame["estimate"].to_numpy(float)
    se = frame["std_error"].to_numpy(float)
    z = critical(audit.alpha)
    sig = frame["p_value"].to_numpy(float) < audit.alpha
    colours = np.where(sig, BLUE, GREY)
    area, width = sizes(n)
    accepted = frame["acceptable"].to_numpy(bool)
    # Variants that fail a specification test are drawn hollow and faint: they are
    # shown, but the verdicts are judged on the acceptable ones.
    rgba = [to_rgba(c, 0.75 if a else 0.3) for c, a in zip(colours, accepted)]
    ax.vlines(x, est - z * se, est + z * se, colors=rgba, linewidth=width)
    ax.scatter(x, est, s=area, facecolors=[to_rgba(c) if a else "none"
                                           for c, a in zip(colours, accepted)],
               edgecolors=colours, linewidths=np.where(accepted, 0.0, 0.9), zorder=3)
    ax.axhline(0.0, color=BLACK, linewidth=0.7)
    handles = [
        Line2D([], [], color=BLUE, marker="o", linestyle="-", markersize=4,
               label=f"significant at {audit.alpha:g}"),
        Line2D([], [], color=GREY, marker="o", linestyle="-", markersize=4,
               label="not significant"),
    ]
    if not accepted.all():
        handles.append(Line2D([], [], color=GREY, marker="o", markerfacecolor="none",
                              linestyle="none", markersize=4,
                              label="fails a specification test"))
    base = mark_base_and_truth(ax, handles, audit, term, frame, x, est, area, truth_style="--")
    ax.set_ylabel(f"estimate, {100 * (1 - audit.alpha):g}% CI", fontsize=8)
    ax.legend(handles=handles, fontsize=7, frameon=False, loc="lower left",
              bbox_to_anchor=(0.0, 1.0), ncol=min(len(handles), 5), borderaxespad=0.2)
    ax.tick_params(labelbottom=False)
    ax.set_xlim(-0.5 - 0.01 * n, n - 0.5 + 0.01 * n)

    # choice panel
    if not rows:
        no_data(ax_choice, "no settings recorded")
    else:
        for r, (col, value) in enumerate(rows):
            used = np.flatnonzero(same(frame[col], value))
            ax_choice.scatter(x[used], np.full(used.size, r), marker="|" if n > 60 else "s",
                              s=area * (1.5 if n > 60 else 0.8), c=BLACK, linewidths=width)
            if r and rows[r - 1][0] != col:
                ax_choice.axhline(r - 0.5, color=LIGHT, linewidth=0.8)
        if base.size:
            ax_choice.axvline(x[base[0]], color=VERMILLION, linewidth=0.8, alpha=0.6)
        ax_choice.set_yticks(np.arange(len(rows)))
        ax_choice.set_yticklabels([mathtext_safe(f"{setting_name(c)}: {value_text(v)}") for c, v in rows],
                                  fontsize=7)
        ax_choice.set_ylim(len(rows) - 0.5, -0.5)
    variant_ticks(ax_choice, frame["variant"], max_tick_labels, "variants, sorted by estimate")
    return fig

