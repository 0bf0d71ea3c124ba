"""Figure 1: the specification curve of one focus term (Simonsohn, Simmons & Nelson 2020)."""
from __future__ import annotations

import numpy as np
from matplotlib.colors import to_rgba
from matplotlib.figure import Figure
from matplotlib.lines import Line2D

from ..inputs import AuditFolder
from ..labels import mathtext_safe, setting_name, term_text, value_text
from .common import (BLACK, BLUE, GREY, LANES, LIGHT, MAX_TICK_LABELS, VERMILLION,
                     attach_tooltips, choice_rows, clipped_handle, critical, draw_intervals,
                     draw_lanes, lane_positions, mark_base_and_truth, no_data, same, sizes,
                     style, value_limits, variant_ticks, variant_tooltips)


def _named(audit, term: str) -> str:
    """``Leverage (x[t])`` when the model file labels the term, else ``x[t]``."""
    text = term_text(audit, term)
    return term if text == term else f"{text} ({term})"


def plot_specification_curve(fig: Figure, audit: AuditFolder, term: str, *,
                             max_tick_labels: int = MAX_TICK_LABELS) -> Figure:
    """Estimates of ``term`` with (1 - alpha) confidence intervals (estimate ± z·se,
    normal critical value) over every estimated variant, the base model ringed, zero
    and (when known) the true value as lines; underneath, one row per setting value
    with a mark for each variant that uses it.

    The variants are drawn in lanes, left to right: acceptable (the verdict is
    judged on these; filled and outlined), untestable, and failing a specification
    test (both hollow, faded, on a grey ground); within a lane sorted by estimate.
    Each lane is headed by its count. The value axis includes zero only when zero is
    near the data, and intervals much longer than the others are clipped at the
    axis with an arrow head (see :func:`.common.value_limits`).

    Specification curve: Simonsohn, Simmons & Nelson (2020), Nature Human
    Behaviour 4, 1208-1214."""
    frame, x, codes = lane_positions(audit.term_estimates(term))
    rows = choice_rows(audit, frame)
    n = len(frame)
    grid = fig.add_gridspec(2, 1, height_ratios=[3.0, max(1.0, 0.28 * len(rows))], hspace=0.25)
    ax = fig.add_subplot(grid[0])
    ax_choice = fig.add_subplot(grid[1], sharex=ax)
    style(ax)
    style(ax_choice)
    ax.set_title(mathtext_safe(f"Specification curve: {_named(audit, term)}"), fontsize=10, loc="left", pad=16)
    if n == 0:
        no_data(ax, f"no estimated variant has a value for {term}")
        no_data(ax_choice, "")
        return fig

    est = frame["estimate"].to_numpy(float)
    se = frame["std_error"].to_numpy(float)
    z = critical(audit.alpha)
    low, high = est - z * se, est + z * se
    sig = frame["p_value"].to_numpy(float) < audit.alpha
    colours = np.where(sig, BLUE, GREY)
    area, width = sizes(n)
    judged = codes == 0
    truth = audit.truth_value(term)
    base_est = est[frame["variant"].to_numpy() == audit.base_variant]
    limits = value_limits(est, low, high, extra=[truth, *base_est])
    # Variants that are not acceptable are shown, hollow and faint, in their own
    # lanes: the verdicts are judged on the acceptable ones.
    line_rgba = [to_rgba(c, 0.8 if a else 0.2) for c, a in zip(colours, judged)]
    clipped = draw_intervals(ax, x, low, high, line_rgba, width, limits)
    marks = ax.scatter(x, est, s=area,
                       facecolors=[to_rgba(c) if a else "none" for c, a in zip(colours, judged)],
                       edgecolors=[to_rgba(BLACK, 0.9) if a else to_rgba(c, 0.35)
                                   for c, a in zip(colours, judged)],
                       linewidths=np.where(judged, 0.4, 0.7), zorder=3)
    attach_tooltips(ax, marks, variant_tooltips(audit, frame))
    lanes = draw_lanes(ax, x, codes)
    if len(lanes) > 1:  # room above the axes for the stacked lane headings
        ax.set_title(mathtext_safe(f"Specification curve: {_named(audit, term)}"),
                     fontsize=10, loc="left", pad=6 + 9 * len(lanes))
    if limits[0] <= 0.0 <= limits[1]:
        ax.axhline(0.0, color=BLACK, linewidth=0.7)
    handles = [
        Line2D([], [], color=BLUE, marker="o", linestyle="-", markersize=4,
               label=f"significant at {audit.alpha:g}"),
        Line2D([], [], color=GREY, marker="o", linestyle="-", markersize=4,
               label="not significant"),
    ]
    for code, count in lanes:
        if code == 0 and len(lanes) > 1:
            handles.append(Line2D([], [], color=BLUE, marker="o", markeredgecolor=BLACK,
                                  linestyle="none", markersize=4,
                                  label=f"{LANES[0][1]} ({count})"))
        elif code:
            handles.append(Line2D([], [], color=GREY, marker="o", markerfacecolor="none",
                                  alpha=0.6, linestyle="none", markersize=4,
                                  label=f"{LANES[code][1]} ({count})"))
    if clipped:
        handles.append(clipped_handle(clipped))
    base = mark_base_and_truth(ax, handles, audit, term, frame, x, est, area, truth_style="--")
    ax.set_ylabel(f"estimate, {100 * (1 - audit.alpha):g}% CI", fontsize=8)
    ax.legend(handles=handles, fontsize=7, frameon=False, loc="upper left",
              bbox_to_anchor=(1.01, 1.0), borderaxespad=0.2)
    ax.tick_params(labelbottom=False)
    span = (x[-1] - x[0]) if n > 1 else 1.0
    ax.set_xlim(x[0] - 0.5 - 0.01 * span, x[-1] + 0.5 + 0.01 * span)

    # choice panel
    if not rows:
        no_data(ax_choice, "no settings recorded")
    else:
        for r, (col, value) in enumerate(rows):
            used = np.flatnonzero(same(frame[col], value))
            ax_choice.scatter(x[used], np.full(used.size, r), marker="|" if n > 60 else "s",
                              s=area * (1.5 if n > 60 else 0.8),
                              c=[BLACK if judged[i] else GREY for i in used], linewidths=width)
            if r and rows[r - 1][0] != col:
                ax_choice.axhline(r - 0.5, color=LIGHT, linewidth=0.8)
        if base.size:
            ax_choice.axvline(x[base[0]], color=VERMILLION, linewidth=0.8, alpha=0.6)
        ax_choice.set_yticks(np.arange(len(rows)))
        ax_choice.set_yticklabels([mathtext_safe(f"{setting_name(c)}: {value_text(v)}")
                                   for c, v in rows], fontsize=7)
        ax_choice.set_ylim(len(rows) - 0.5, -0.9)  # room under the upper panel's ticks
    what = "variants, by lane and estimate" if len(lanes) > 1 else "variants, sorted by estimate"
    variant_ticks(ax_choice, frame["variant"], max_tick_labels, what, x=x)
    return fig
