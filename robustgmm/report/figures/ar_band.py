"""Figure 3: the autoregressive coefficient of every variant against the within-OLS
band; with several outcome lags, also the sum of the lags' coefficients."""
from __future__ import annotations

import numpy as np
import pandas as pd
from matplotlib.lines import Line2D
from matplotlib.patches import Patch

from ..inputs import AuditFolder
from ..labels import band_arrays, mathtext_safe, term_text
from .common import (BLACK, BLUE, MAX_TICK_LABELS, ORANGE, SKY, VERMILLION, attach_tooltips,
                     clipped_handle, critical, draw_intervals, mark_base_and_truth, no_data,
                     ring_base, sizes, sorted_term, style, value_limits, variant_ticks, variant_tooltips)


def _draw_band(ax, x, fe, ols, handles):
    """The shaded band between the within and pooled OLS values, per variant."""
    n = len(x)
    lo, hi = np.minimum(fe, ols), np.maximum(fe, ols)
    xs = np.concatenate([[x[0] - 0.5], x, [x[-1] + 0.5]])
    idx = np.r_[0, np.arange(n), n - 1]
    ax.fill_between(xs, lo[idx], hi[idx], step="mid", color=SKY, alpha=0.25, linewidth=0)
    ax.step(xs, fe[idx], where="mid", color=BLUE, linestyle="--", linewidth=1)
    ax.step(xs, ols[idx], where="mid", color=ORANGE, linestyle="--", linewidth=1)
    handles += [Patch(facecolor=SKY, alpha=0.4, label="between within and OLS"),
                Line2D([], [], color=BLUE, linestyle="--", label="within (FE), biased down"),
                Line2D([], [], color=ORANGE, linestyle="--", label="pooled OLS, biased up")]
    return lo, hi


def _finish(ax, audit, frame, x, handles, n, max_tick_labels):
    ax.set_xlim(-0.5 - 0.01 * n, n - 0.5 + 0.01 * n)
    ax.set_ylabel(f"estimate, {100 * (1 - audit.alpha):g}% CI", fontsize=8)
    variant_ticks(ax, frame["variant"], max_tick_labels, "variants, sorted by estimate")
    ax.legend(handles=handles, fontsize=7, frameon=False, loc="center left",
              bbox_to_anchor=(1.01, 0.5))


def plot_ar_band(ax, audit: AuditFolder, term: str, *, max_tick_labels: int = MAX_TICK_LABELS):
    """The autoregressive coefficient ``term`` in every estimated variant (sorted,
    with confidence intervals) against the band between the within (FE) estimate,
    biased down (Nickell 1981), and the pooled OLS estimate, biased up; a credible
    estimate lies between them (Bond, Hoeffler & Temple 2001; Bond 2002)."""
    style(ax)
    named = term_text(audit, term)
    named = term if named == term else f"{named} ({term})"
    ax.set_title(mathtext_safe(f"Autoregressive coefficient {named} against the within-OLS band"),
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
    extra = [audit.truth_value(term)]
    if band is not None:
        lo, hi = _draw_band(ax, x, band[0], band[1], handles)
        inside = (est >= lo) & (est <= hi)
        extra += [float(np.min(lo)), float(np.max(hi))]
    else:
        inside = np.ones(n, bool)
    colours = np.where(inside, BLACK, VERMILLION)
    limits = value_limits(est, est - z * se, est + z * se, extra=extra)
    clipped = draw_intervals(ax, x, est - z * se, est + z * se,
                             [c for c in colours], width, limits)
    marks = ax.scatter(x, est, s=area, c=colours, linewidths=0, zorder=3)
    attach_tooltips(ax, marks, variant_tooltips(audit, frame))
    handles += [Line2D([], [], color=BLACK, marker="o", linestyle="none", markersize=4,
                       label="inside the band")]
    if band is not None and not inside.all():
        handles.append(Line2D([], [], color=VERMILLION, marker="o", linestyle="none",
                              markersize=4, label="outside the band"))
    if clipped:
        handles.append(clipped_handle(clipped))
    mark_base_and_truth(ax, handles, audit, term, frame, x, est, area, truth_style="-.")
    _finish(ax, audit, frame, x, handles, n, max_tick_labels)
    return ax


def persistence_frame(audit: AuditFolder) -> pd.DataFrame:
    """Estimated variants whose band check is on the sum of the AR coefficients
    (several outcome lags): ``variant``, ``ar_term``, ``estimate`` (the sum, as the
    audit wrote it in variants.csv), ``fe``, ``ols``, ``in_bounds``; sorted."""
    v = audit.ok_variants
    need = {"ar_term", "ar_coefficient", "ar_fe", "ar_ols"}
    if not need <= set(v.columns):
        return pd.DataFrame()
    rows = v[v["ar_term"].astype(str).str.startswith("sum(")].copy()
    rows["estimate"] = pd.to_numeric(rows["ar_coefficient"], errors="coerce")
    rows = rows[np.isfinite(rows["estimate"].to_numpy(float))]
    rows["fe"] = pd.to_numeric(rows["ar_fe"], errors="coerce")
    rows["ols"] = pd.to_numeric(rows["ar_ols"], errors="coerce")
    return rows.sort_values(["estimate", "variant"], kind="mergesort").reset_index(drop=True)


def plot_ar_sum(ax, audit: AuditFolder, *, max_tick_labels: int = MAX_TICK_LABELS):
    """The sum of the autoregressive coefficients (the persistence of the outcome
    when it has several lags) in every estimated variant against the band between
    its within and pooled OLS values on the variant's own sample (Bond, Hoeffler &
    Temple 2001, who apply the band to the persistence). The sum and its band are
    read from variants.csv (``ar_coefficient``, ``ar_fe``, ``ar_ols``, ``in_bounds``).
    No interval is drawn: the covariance of the lags is not in the audit files."""
    style(ax)
    frame = persistence_frame(audit)
    label = str(frame["ar_term"].iloc[0]) if not frame.empty else "sum of AR coefficients"
    ax.set_title(mathtext_safe(f"Sum of the autoregressive coefficients {label} "
                               "against its within-OLS band"), fontsize=10, loc="left")
    n = len(frame)
    if n == 0:
        return no_data(ax, "no estimated variant reports the sum of its AR coefficients")
    x = np.arange(n)
    est = frame["estimate"].to_numpy(float)
    area, _ = sizes(n)
    handles = []
    fe, ols = frame["fe"].to_numpy(float), frame["ols"].to_numpy(float)
    has_band = np.isfinite(fe).all() and np.isfinite(ols).all()
    if has_band:
        _draw_band(ax, x, fe, ols, handles)
    if "in_bounds" in frame.columns:
        inside = frame["in_bounds"].map(lambda s: str(s).strip().lower() in ("true", "1", "1.0"))
        inside = inside.to_numpy(bool)
    else:
        inside = np.ones(n, bool)
    colours = np.where(inside, BLACK, VERMILLION)
    marks = ax.scatter(x, est, s=max(area, 8.0), c=colours, linewidths=0, zorder=3)
    attach_tooltips(ax, marks, variant_tooltips(audit, frame, "estimate", None))
    handles.append(Line2D([], [], color=BLACK, marker="o", linestyle="none", markersize=4,
                          label=f"inside the band ({int(inside.sum())})"))
    if not inside.all():
        handles.append(Line2D([], [], color=VERMILLION, marker="o", linestyle="none",
                              markersize=4, label=f"outside the band ({int((~inside).sum())})"))
    ring_base(ax, handles, audit, frame, x, est, area)
    extra = [float(np.min(np.minimum(fe, ols))), float(np.max(np.maximum(fe, ols)))] \
        if has_band else []
    ax.set_ylim(*value_limits(est, est, est, extra=extra))
    _finish(ax, audit, frame, x, handles, n, max_tick_labels)
    ax.set_ylabel("sum of AR coefficients", fontsize=8)
    return ax
