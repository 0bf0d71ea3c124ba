"""The audit's figures, drawn with matplotlib's object-oriented API only.

Every plot function takes a matplotlib ``Axes`` (or a ``Figure`` when it needs
several panels), draws into it and returns it; nothing touches pyplot's global
state, so the functions are safe in parallel workers and in notebooks::

    from matplotlib.figure import Figure
    from robustgmm.report import read_audit_folder, figures
    audit = read_audit_folder("audit_out")
    fig = figures.plot_specification_curve(Figure(figsize=(9, 5)), audit, "cash[t-1]")

The four figures:

1. specification curve per focus term (Simonsohn, Simmons & Nelson 2020, Nature
   Human Behaviour 4, 1208-1214): estimates of every estimated variant, sorted, with
   confidence intervals and the base model marked; below, which choices each
   variant makes;
2. Hansen p-value against the number of instruments, grouped by equations and
   instrument form, with the 0.05 rejection line, the 0.25 warning line (common
   practice; Roodman 2009 on proliferation) and the instruments = units line;
3. the autoregressive coefficient of every variant against the band between the
   within (fixed-effects) and pooled OLS estimates (Bond, Hoeffler & Temple 2001;
   Bond 2002);
4. a diagnostics matrix: variants x checks.

Colours are the Okabe-Ito palette (Okabe & Ito 2008, "Color Universal Design"),
distinguishable with the common forms of colour-vision deficiency; marks also differ
in shape so that nothing depends on colour alone.
"""
from __future__ import annotations

import io
import re
from dataclasses import dataclass, field
from pathlib import Path

import matplotlib
import numpy as np
import pandas as pd
from matplotlib.colors import ListedColormap, to_rgba
from matplotlib.figure import Figure
from matplotlib.lines import Line2D
from matplotlib.patches import Patch
from scipy.stats import norm

from ..atomic import atomic_write_bytes
from .inputs import AuditFolder

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

SETTING_NAMES = {
    "equations": "equations",
    "transform": "transform",
    "steps": "steps",
    "form": "instrument form",
    "first_lag": "first lag",
    "last_lag": "last lag",
    "time_effects": "time effects",
    "errors": "errors",
    "sample": "sample",
}


def setting_name(column: str) -> str:
    """A readable name for a settings column (role columns keep their own name)."""
    return SETTING_NAMES.get(column, column.replace("_", " "))


def value_text(value) -> str:
    """A setting value as text: integers without a trailing .0, NaN as 'n/a'."""
    if value is None or (isinstance(value, float) and np.isnan(value)):
        return "n/a"
    if isinstance(value, (float, np.floating)) and float(value).is_integer():
        return str(int(value))
    return str(value)


def slug(term: str) -> str:
    """A file-name-safe form of a term label: ``cash[t-1]`` -> ``cash_t-1``."""
    out = re.sub(r"[^A-Za-z0-9.\-]+", "_", term).strip("_.")
    return out or "term"


# ---------------------------------------------------------------------------
# shared helpers

def _style(ax) -> None:
    ax.spines["top"].set_visible(False)
    ax.spines["right"].set_visible(False)
    ax.tick_params(labelsize=8)


def _sizes(n: int) -> tuple[float, float]:
    """Marker area and line width that stay legible from 1 to several hundred marks."""
    return float(np.clip(2400.0 / max(n, 1), 4.0, 36.0)), float(np.clip(150.0 / max(n, 1), 0.5, 2.0))


def _variant_ticks(ax, ids, n_limit=MAX_TICK_LABELS, what="variants") -> None:
    n = len(ids)
    if 0 < n <= n_limit:
        ax.set_xticks(np.arange(n))
        ax.set_xticklabels(list(ids), rotation=90, fontsize=7)
    else:
        ax.set_xticks([])
    ax.set_xlabel(f"{n} {what}" if n != 1 else f"1 {what[:-1] if what.endswith('s') else what}",
                  fontsize=8)


def _no_data(ax, text: str):
    ax.text(0.5, 0.5, text, ha="center", va="center", transform=ax.transAxes,
            fontsize=9, color=GREY)
    ax.set_xticks([])
    ax.set_yticks([])
    return ax


def _critical(alpha: float) -> float:
    return float(norm.ppf(1.0 - alpha / 2.0))


def _sorted_term(audit: AuditFolder, term: str) -> pd.DataFrame:
    frame = audit.term_estimates(term)
    # stable order: estimate, then variant id (ties are common with identical fits)
    return frame.sort_values(["estimate", "variant"], kind="mergesort").reset_index(drop=True)


def _choice_rows(audit: AuditFolder, frame: pd.DataFrame):
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


def _same(series: pd.Series, value) -> np.ndarray:
    return (series.map(value_text) == value_text(value)).to_numpy()


# ---------------------------------------------------------------------------
# 1. specification curve

def _mark_base_and_truth(ax, handles, audit, term, frame, x, est, area, truth_style):
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


def plot_specification_curve(fig: Figure, audit: AuditFolder, term: str, *,
                             max_tick_labels: int = MAX_TICK_LABELS) -> Figure:
    """Sorted estimates of ``term`` with (1 - alpha) confidence intervals (estimate
    ± z·se, normal critical value) over every estimated variant, the base model
    ringed, zero and (when known) the true value as lines; underneath, one row per
    setting value with a mark for each variant that uses it.

    Specification curve: Simonsohn, Simmons & Nelson (2020), Nature Human
    Behaviour 4, 1208-1214."""
    frame = _sorted_term(audit, term)
    rows = _choice_rows(audit, frame)
    n = len(frame)
    grid = fig.add_gridspec(2, 1, height_ratios=[3.0, max(1.0, 0.28 * len(rows))], hspace=0.08)
    ax = fig.add_subplot(grid[0])
    ax_choice = fig.add_subplot(grid[1], sharex=ax)
    _style(ax)
    _style(ax_choice)
    ax.set_title(f"Specification curve: {term}", fontsize=10, loc="left", pad=20)
    if n == 0:
        _no_data(ax, f"no estimated variant has a value for {term}")
        _no_data(ax_choice, "")
        return fig

    x = np.arange(n)
    est = frame["estimate"].to_numpy(float)
    se = frame["std_error"].to_numpy(float)
    z = _critical(audit.alpha)
    sig = frame["p_value"].to_numpy(float) < audit.alpha
    colours = np.where(sig, BLUE, GREY)
    area, width = _sizes(n)
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
    base = _mark_base_and_truth(ax, handles, audit, term, frame, x, est, area, truth_style="--")
    ax.set_ylabel(f"estimate, {100 * (1 - audit.alpha):g}% CI", fontsize=8)
    ax.legend(handles=handles, fontsize=7, frameon=False, loc="lower left",
              bbox_to_anchor=(0.0, 1.0), ncol=min(len(handles), 5), borderaxespad=0.2)
    ax.tick_params(labelbottom=False)
    ax.set_xlim(-0.5 - 0.01 * n, n - 0.5 + 0.01 * n)

    # choice panel
    if not rows:
        _no_data(ax_choice, "no settings recorded")
    else:
        for r, (col, value) in enumerate(rows):
            used = np.flatnonzero(_same(frame[col], value))
            ax_choice.scatter(x[used], np.full(used.size, r), marker="|" if n > 60 else "s",
                              s=area * (1.5 if n > 60 else 0.8), c=BLACK, linewidths=width)
            if r and rows[r - 1][0] != col:
                ax_choice.axhline(r - 0.5, color=LIGHT, linewidth=0.8)
        if base.size:
            ax_choice.axvline(x[base[0]], color=VERMILLION, linewidth=0.8, alpha=0.6)
        ax_choice.set_yticks(np.arange(len(rows)))
        ax_choice.set_yticklabels([f"{setting_name(c)}: {value_text(v)}" for c, v in rows],
                                  fontsize=7)
        ax_choice.set_ylim(len(rows) - 0.5, -0.5)
    _variant_ticks(ax_choice, frame["variant"], max_tick_labels, "variants, sorted by estimate")
    return fig


# ---------------------------------------------------------------------------
# 2. Hansen p-value drift

def _group_columns(frame: pd.DataFrame) -> list[str]:
    return [c for c in ("equations", "form") if c in frame.columns]


def plot_hansen_drift(ax, audit: AuditFolder):
    """Hansen J p-value of every estimated variant against its instrument count.

    Groups (colour = equations, shape = instrument form). Horizontal lines: the
    rejection level (Hansen 1982) and the high-p warning line (0.25 by default,
    common practice; Roodman 2009 shows that many instruments push the p-value
    toward 1). Vertical line: instruments = units (common practice: instruments
    should not outnumber units)."""
    _style(ax)
    ax.set_title("Hansen test p-value against instrument count", fontsize=10, loc="left")
    frame = audit.ok_variants
    frame = frame[np.isfinite(frame["hansen_p"].to_numpy(float))
                  & np.isfinite(frame["instruments"].to_numpy(float))]
    if frame.empty:
        return _no_data(ax, "no estimated variant reports a Hansen test")
    area, _ = _sizes(len(frame))
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
            label = ", ".join(k for k in (ck, mk) if k) or "variants"
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


# ---------------------------------------------------------------------------
# 3. AR coefficient against the OLS-FE band

def band_arrays(audit: AuditFolder, term: str, frame: pd.DataFrame):
    """Lower/upper band per plotted variant: per-variant rows of bounds.csv when the
    audit writes them, else the single band of the base sample."""
    rows = audit.bounds_for(term)
    if rows.empty:
        return None
    if "variant" in rows.columns:
        merged = frame[["variant"]].merge(rows[["variant", "fe", "ols"]], on="variant", how="left")
        if merged["fe"].notna().all():
            return merged["fe"].to_numpy(float), merged["ols"].to_numpy(float)
    if "sample" in rows.columns and "sample" in frame.columns:
        merged = frame[["sample"]].astype(str).merge(
            rows[["sample", "fe", "ols"]].astype({"sample": str}), on="sample", how="left")
        if merged["fe"].notna().all() and len(merged) == len(frame):
            return merged["fe"].to_numpy(float), merged["ols"].to_numpy(float)
    fe, ols = audit.band(term)
    return np.full(len(frame), fe), np.full(len(frame), ols)


def plot_ar_band(ax, audit: AuditFolder, term: str, *, max_tick_labels: int = MAX_TICK_LABELS):
    """The autoregressive coefficient ``term`` in every estimated variant (sorted,
    with confidence intervals) against the band between the within (FE) estimate,
    biased down (Nickell 1981), and the pooled OLS estimate, biased up; a credible
    estimate lies between them (Bond, Hoeffler & Temple 2001; Bond 2002)."""
    _style(ax)
    ax.set_title(f"Autoregressive coefficient {term} against the within-OLS band",
                 fontsize=10, loc="left")
    frame = _sorted_term(audit, term)
    n = len(frame)
    if n == 0:
        return _no_data(ax, f"no estimated variant has a value for {term}")
    x = np.arange(n)
    est = frame["estimate"].to_numpy(float)
    se = frame["std_error"].to_numpy(float)
    z = _critical(audit.alpha)
    area, width = _sizes(n)
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
    _mark_base_and_truth(ax, handles, audit, term, frame, x, est, area, truth_style="-.")
    ax.set_xlim(-0.5 - 0.01 * n, n - 0.5 + 0.01 * n)
    ax.set_ylabel(f"estimate, {100 * (1 - audit.alpha):g}% CI", fontsize=8)
    _variant_ticks(ax, frame["variant"], max_tick_labels, "variants, sorted by estimate")
    ax.legend(handles=handles, fontsize=7, frameon=False, loc="center left",
              bbox_to_anchor=(1.01, 0.5))
    return ax


# ---------------------------------------------------------------------------
# 4. diagnostics matrix

PASS, WARN, FAIL, NOT_ESTIMATED = 0, 1, 2, 3
STATE_NAMES = {PASS: "passes", WARN: "warning", FAIL: "fails",
               NOT_ESTIMATED: "not estimated"}


def _difference_hansen_column(frame: pd.DataFrame) -> str | None:
    """The p-value column of the difference-in-Hansen test for the level-equation
    instruments, when the audit writes one (name contains 'diff', 'hansen' and
    'level'; or a single 'diff...hansen..._p' column)."""
    cands = [c for c in frame.columns
             if "hansen" in c.lower() and "diff" in c.lower() and c.lower().endswith("p")]
    levels = [c for c in cands if "level" in c.lower()]
    if levels:
        return levels[0]
    return cands[0] if len(cands) == 1 else None


def diagnostics_table(audit: AuditFolder) -> pd.DataFrame:
    """Variants x checks with states PASS / WARN / FAIL / NOT_ESTIMATED (NaN = the
    check does not apply or was not reported). Thresholds are the audit's own.

    Checks: AR(2) does not reject (Arellano & Bond 1991); Hansen does not reject
    (Hansen 1982); Hansen p below the warning line (common practice; Roodman 2009);
    instruments do not outnumber units (common practice); difference-in-Hansen of the
    level-equation instruments does not reject (Blundell & Bond 1998; Roodman 2009);
    AR coefficient inside the within-OLS band (Bond, Hoeffler & Temple 2001)."""
    v = audit.variants
    t = audit.thresholds
    ok = (v["status"] == "ok").to_numpy()

    def state(bad, warn=None, valid=None):
        out = np.where(bad, FAIL, PASS).astype(float)
        if warn is not None:
            out = np.where(~bad & warn, WARN, out)
        if valid is not None:
            out = np.where(valid, out, np.nan)
        return np.where(ok, out, NOT_ESTIMATED)

    ar2 = v["ar2_p"].to_numpy(float)
    hansen = v["hansen_p"].to_numpy(float)
    inst = v["instruments"].to_numpy(float)
    units = v["units"].to_numpy(float)
    checks = {
        "AR(2) does not reject": state(ar2 < t["ar2_reject"], valid=np.isfinite(ar2)),
        "Hansen does not reject": state(hansen < t["hansen_reject"], valid=np.isfinite(hansen)),
        "Hansen p below warning line": state(np.zeros(len(v), bool), hansen >= t["hansen_too_high"],
                               valid=np.isfinite(hansen)),
        "instruments within units": state(inst > units * t["instruments_per_unit"],
                                     valid=np.isfinite(inst) & np.isfinite(units)),
    }
    dh = _difference_hansen_column(v)
    if dh is not None:
        p = pd.to_numeric(v[dh], errors="coerce").to_numpy(float)
        checks["diff-in-Hansen (levels) ok"] = state(p < t["difference_hansen_reject"],
                                                  valid=np.isfinite(p))
    inside = _in_bounds(audit)
    if inside is not None:
        checks["AR coef. inside OLS-FE band"] = state(inside == 0.0, valid=np.isfinite(inside))
    out = pd.DataFrame(checks, index=v["variant"].to_numpy())
    out.index.name = "variant"
    return out


def _in_bounds(audit: AuditFolder) -> np.ndarray | None:
    """1.0 inside, 0.0 outside, NaN unknown; from the audit's ``in_bounds`` column, or
    recomputed from estimates.csv and bounds.csv for the first AR term."""
    v = audit.variants
    if "in_bounds" in v.columns:
        vals = v["in_bounds"].map(lambda s: np.nan if pd.isna(s) or str(s).strip() == "" else
                                  float(str(s).strip().lower() in ("true", "1", "1.0", "yes")))
        return vals.to_numpy(float)
    if not audit.ar_terms:
        return None
    term = audit.ar_terms[0]
    frame = audit.term_estimates(term, ok_only=False)
    lo_hi = band_arrays(audit, term, frame)
    if lo_hi is None:
        return None
    lo, hi = np.minimum(*lo_hi), np.maximum(*lo_hi)
    est = frame["estimate"].to_numpy(float)
    inside = pd.Series(((est >= lo) & (est <= hi)).astype(float), index=frame["variant"])
    return v["variant"].map(inside).to_numpy(float)


def plot_diagnostics_matrix(ax, audit: AuditFolder, *, max_tick_labels: int = MAX_TICK_LABELS):
    """Variants (columns, base first) x checks (rows); colour and legend give the state."""
    _style(ax)
    ax.set_title("Diagnostics by variant", fontsize=10, loc="left")
    table = diagnostics_table(audit)
    order = [audit.base_variant] + [i for i in table.index if i != audit.base_variant]
    table = table.loc[order]
    matrix = np.ma.masked_invalid(table.to_numpy(float).T)
    cmap = ListedColormap([GREEN, YELLOW, VERMILLION, "#595959"]).with_extremes(bad=LIGHT)
    n = len(table)
    ax.imshow(matrix, aspect="auto", cmap=cmap, vmin=-0.5, vmax=3.5, interpolation="nearest")
    ax.set_yticks(np.arange(table.shape[1]))
    ax.set_yticklabels(list(table.columns), fontsize=8)
    if n <= 80:  # cell borders help only while cells are wide enough to see
        ax.set_xticks(np.arange(-0.5, n, 1), minor=True)
        ax.set_yticks(np.arange(-0.5, table.shape[1], 1), minor=True)
        ax.grid(which="minor", color="white", linewidth=0.8)
        ax.tick_params(which="minor", length=0)
    ax.spines["left"].set_visible(False)
    ax.spines["bottom"].set_visible(False)
    _variant_ticks(ax, table.index, max_tick_labels, "variants (base first)")
    handles = [Patch(facecolor=c, label=STATE_NAMES[s]) for s, c in
               ((PASS, GREEN), (WARN, YELLOW), (FAIL, VERMILLION), (NOT_ESTIMATED, "#595959"))]
    handles.append(Patch(facecolor=LIGHT, label="not applicable"))
    ax.legend(handles=handles, fontsize=7, frameon=False, loc="upper left",
              bbox_to_anchor=(0.0, -0.12 if n > max_tick_labels else -0.35), ncol=5)
    return ax


# ---------------------------------------------------------------------------
# how to read each figure (shared by the HTML and Markdown reports)

CAPTIONS = {
    "spec_curve": (
        "Each dot is one estimated variant's coefficient on {term}, sorted from smallest "
        "to largest, with its confidence interval; blue marks are significant at the "
        "audit's level, grey ones are not, and the ringed dot is the base model. "
        "Hollow, faint marks are variants that fail a specification test (Hansen, "
        "AR(2) or difference-in-Hansen); they are shown but the verdict is judged on "
        "the others. The "
        "panel underneath shows the choices each variant makes: read a column down for "
        "one variant's settings, read a row across to see where one choice puts the "
        "estimate. A robust coefficient keeps its sign and significance along the whole "
        "curve; a curve that crosses zero, or changes colour where one row of the panel "
        "switches, shows which choice the conclusion depends on (specification curve: "
        "Simonsohn, Simmons & Nelson 2020)."),
    "hansen_drift": (
        "Each mark is one estimated variant: its Hansen J p-value against its number "
        "of instruments; colour gives the equations, shape the instrument form. Marks "
        "below the dashed line reject the joint validity of the instruments (Hansen "
        "1982). Marks above the dotted warning line (0.25 by default, common practice), "
        "and above all p-values near 1, suggest that so many instruments have weakened "
        "the test (Roodman 2009); they usually sit to the right. The dash-dotted line is "
        "where instruments would equal units (common practice: stay left of it)."),
    "ar_band": (
        "Each dot is one estimated variant's autoregressive coefficient {term} with its "
        "confidence interval, sorted. Pooled OLS is biased up and the within "
        "(fixed-effects) estimator is biased down in short panels (Nickell 1981), so a "
        "consistent GMM estimate should lie in the shaded band between them (Bond, "
        "Hoeffler & Temple 2001; Bond 2002). Vermillion dots lie outside the band: "
        "those variants are suspect (weak instruments pull toward the within value, "
        "too many instruments toward OLS; Roodman 2009)."),
    "diagnostics": (
        "Rows are checks, columns are variants (base first). Green passes, yellow is a "
        "warning, vermillion fails, dark grey marks a variant that could not be "
        "estimated, light grey a check that does not apply (e.g. no level-equation "
        "instruments in difference GMM) or was not reported. A column full of green is "
        "a variant with clean diagnostics; a row with many failures points to a "
        "problem shared by the model."),
}


def caption(kind: str, term: str | None = None) -> str:
    return CAPTIONS[kind].format(term=term or "")


# ---------------------------------------------------------------------------
# rendering to files

@dataclass(frozen=True)
class FigureFile:
    """One rendered figure: its base name, title, the PNG bytes (for inlining) and
    the paths written."""

    name: str
    title: str
    kind: str
    term: str | None
    png: bytes
    paths: tuple[Path, ...] = field(default_factory=tuple)


def _save(fig: Figure, out_dir: Path, name: str, formats) -> tuple[bytes, list[Path]]:
    paths, png = [], b""
    # Metadata without dates or versions so that a rebuild is byte-identical.
    metadata = {"png": {"Software": None}, "svg": {"Date": None},
                "pdf": {"CreationDate": None, "ModDate": None, "Producer": None}}
    for fmt in formats:
        buf = io.BytesIO()
        fig.savefig(buf, format=fmt, dpi=150 if fmt == "png" else None,
                    bbox_inches="tight", metadata=metadata[fmt])
        data = buf.getvalue()
        if fmt == "png":
            png = data
        paths.append(atomic_write_bytes(out_dir / f"{name}.{fmt}", data))
    return png, paths


def render_figures(audit: AuditFolder, out_dir, *, formats=("png", "svg", "pdf")) -> list[FigureFile]:
    """Draw every figure into ``out_dir`` (normally ``AUDIT/figures``) in each format."""
    out_dir = Path(out_dir)
    out_dir.mkdir(parents=True, exist_ok=True)
    made: list[FigureFile] = []
    # rc_context only pins the SVG id salt and font handling for reproducible files.
    with matplotlib.rc_context({"svg.hashsalt": "robustgmm", "svg.fonttype": "path",
                                "pdf.fonttype": 42}):
        used = set()

        def unique(name):
            base, k = name, 2
            while name in used:
                name, k = f"{base}_{k}", k + 1
            used.add(name)
            return name

        def emit(fig, name, title, kind, term=None):
            png, paths = _save(fig, out_dir, name, formats)
            made.append(FigureFile(name, title, kind, term, png, tuple(paths)))

        rows = max((len(_choice_rows(audit, audit.term_estimates(t))) for t in audit.focus),
                   default=0)
        for term in audit.focus:
            fig = Figure(figsize=(9.0, 3.4 + 0.2 * rows))
            plot_specification_curve(fig, audit, term)
            emit(fig, unique(f"spec_curve_{slug(term)}"), f"Specification curve: {term}",
                 "spec_curve", term)
        fig = Figure(figsize=(8.0, 4.0))
        plot_hansen_drift(fig.add_subplot(), audit)
        emit(fig, unique("hansen_drift"), "Hansen p-value against instrument count",
             "hansen_drift")
        for term in audit.ar_terms:
            fig = Figure(figsize=(9.0, 4.0))
            plot_ar_band(fig.add_subplot(), audit, term)
            emit(fig, unique(f"ar_band_{slug(term)}"),
                 f"Autoregressive coefficient {term} against the within-OLS band", "ar_band", term)
        fig = Figure(figsize=(9.0, 3.0))
        plot_diagnostics_matrix(fig.add_subplot(), audit)
        emit(fig, unique("diagnostics"), "Diagnostics by variant", "diagnostics")
    return made
