"""What every figure shares: the palette, marker sizes, axis styling, variant ticks."""
from __future__ import annotations

import numpy as np
import pandas as pd
from matplotlib.lines import Line2D
from scipy.special import ndtri

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


def variant_ticks(ax, ids, n_limit=MAX_TICK_LABELS, what="variants", x=None) -> None:
    n = len(ids)
    if 0 < n <= n_limit:
        ax.set_xticks(np.arange(n) if x is None else x)
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
    """The two-sided normal critical value ``Φ⁻¹(1 − α/2)`` (scipy.special.ndtri, the
    function scipy.stats.norm.ppf evaluates, without importing scipy.stats: 0.45 s of
    the report's start-up in a process that has not estimated anything)."""
    return float(ndtri(1.0 - alpha / 2.0))


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


def ring_base(ax, handles, audit, frame, x, est, area):
    """Ring the base model's estimate; returns the base model's positions."""
    base = np.flatnonzero(frame["variant"].to_numpy() == audit.base_variant)
    if base.size:
        ax.scatter(x[base], est[base], s=area * 3 + 30, facecolors="none",
                   edgecolors=VERMILLION, linewidths=1.6, zorder=4)
        handles.append(Line2D([], [], color=VERMILLION, marker="o", markerfacecolor="none",
                              linestyle="none", label="base model"))
    return base


def mark_base_and_truth(ax, handles, audit, term, frame, x, est, area, truth_style):
    """Ring the base model's estimate and draw the true value when it is known;
    returns the base model's positions."""
    base = ring_base(ax, handles, audit, frame, x, est, area)
    truth = audit.truth_value(term)
    if truth is not None:
        ax.axhline(truth, color=GREEN, linestyle=truth_style, linewidth=1.2)
        handles.append(Line2D([], [], color=GREEN, linestyle=truth_style,
                              label=f"true value {truth:g}"))
    return base




# ---------------------------------------------------------------------------
# lanes: which variants carry the verdict

#: Lanes of the estimate plots, left to right. The verdicts are judged on the
#: acceptable variants (estimated and passing their specification tests); the
#: others are drawn in their own lanes, faded, so a reader sees at once which marks
#: carry the verdict. The lane comes from the audit's ``evidence`` column when it
#: writes one, else from its ``acceptable`` column; nothing is re-derived here.
LANES = (("acceptable", "acceptable"), ("untestable", "untestable"),
         ("rejected", "fails a specification test"))


def lane_codes(frame: pd.DataFrame) -> np.ndarray:
    """0 acceptable, 1 untestable, 2 fails a test, for each row of ``frame``."""
    if "evidence" in frame.columns:
        words = frame["evidence"].astype(str).str.strip().str.lower()
        return np.select([words == "acceptable", words == "untestable"], [0, 1], 2)
    if "acceptable" in frame.columns:
        return np.where(frame["acceptable"].astype(bool).to_numpy(), 0, 2)
    return np.zeros(len(frame), int)


def lane_positions(frame: pd.DataFrame) -> tuple[pd.DataFrame, np.ndarray, np.ndarray]:
    """``frame`` sorted by lane, then estimate, then id; x positions with a gap
    between lanes; the lane code of each row."""
    codes = lane_codes(frame)
    order = np.lexsort((frame["variant"].astype(str).to_numpy(),
                        frame["estimate"].to_numpy(float), codes))
    frame = frame.iloc[order].reset_index(drop=True)
    codes = codes[order]
    gap = max(1.0, 0.03 * len(frame))
    x = np.arange(len(frame), dtype=float) + gap * np.concatenate(
        [[0], np.cumsum(np.diff(codes) != 0)]) if len(frame) else np.zeros(0)
    return frame, x, codes


def draw_lanes(ax, x: np.ndarray, codes: np.ndarray) -> list[tuple[int, int]]:
    """Shade the lanes after the first and name each with its count at the top of
    the axes; returns ``[(code, count)]`` in drawing order."""
    out = []
    for k, (code, name) in enumerate(LANES):
        where = np.flatnonzero(codes == k)
        if not where.size:
            continue
        lo, hi = x[where].min() - 0.5, x[where].max() + 0.5
        if k:
            ax.axvspan(lo, hi, color=LIGHT, alpha=0.5, linewidth=0, zorder=0)
        if len(set(codes.tolist())) > 1:
            # one heading per lane, each a step higher, so narrow lanes never overlap
            ax.annotate(f"{name}: {where.size}", xy=((lo + hi) / 2, 1.0),
                        xycoords=ax.get_xaxis_transform(), xytext=(0, 2 + 9 * len(out)),
                        textcoords="offset points", ha="center", va="bottom", fontsize=7,
                        color=BLACK if k == 0 else GREY, annotation_clip=False)
        out.append((k, int(where.size)))
    return out


# ---------------------------------------------------------------------------
# value axis: zero only when near, long intervals clipped

def value_limits(est: np.ndarray, low: np.ndarray, high: np.ndarray, extra=()) -> tuple[float, float]:
    """y limits for estimates with intervals ``[low, high]``.

    Every estimate (and every value in ``extra``: base, truth, band) is inside. An
    interval may reach beyond the estimates by at most three median half-widths or
    half the range of the estimates, whichever is larger; longer ones are clipped at
    the axis (two outliers with huge intervals must not squash the rest). Zero is
    included only when it lies within the data range plus a quarter of it; the axis
    of a curve far from zero is not flattened to show it."""
    values = np.concatenate([est[np.isfinite(est)], np.asarray(
        [v for v in extra if v is not None and np.isfinite(v)], float)])
    if not values.size:
        return -1.0, 1.0
    core_lo, core_hi = float(values.min()), float(values.max())
    half = (high - low)[np.isfinite(high - low)] / 2.0
    width = float(np.median(half)) if half.size else 0.0
    reach = max(3.0 * width, 0.5 * (core_hi - core_lo))
    lo_f, hi_f = low[np.isfinite(low)], high[np.isfinite(high)]
    y_lo = max(float(lo_f.min()) if lo_f.size else core_lo, core_lo - reach)
    y_hi = min(float(hi_f.max()) if hi_f.size else core_hi, core_hi + reach)
    y_lo, y_hi = min(y_lo, core_lo), max(y_hi, core_hi)
    margin = 0.25 * (y_hi - y_lo)
    if y_lo - margin <= 0.0 <= y_hi + margin:
        y_lo, y_hi = min(y_lo, 0.0), max(y_hi, 0.0)
    span = y_hi - y_lo
    pad = 0.05 * span if span > 0 else max(abs(y_hi) * 0.1, 0.1)
    return y_lo - pad, y_hi + pad


def draw_intervals(ax, x, low, high, colours, width, limits) -> int:
    """Vertical interval lines cut at ``limits``, an arrow head at the axis edge
    where an interval goes on; returns how many intervals were clipped."""
    y0, y1 = limits
    ax.vlines(x, np.clip(low, y0, y1), np.clip(high, y0, y1), colors=colours, linewidth=width)
    clipped = 0
    for edge, beyond, marker in ((y1, high > y1, "^"), (y0, low < y0, "v")):
        if beyond.any():
            cols = [colours[i] for i in np.flatnonzero(beyond)] if isinstance(
                colours, (list, np.ndarray)) and len(colours) == len(x) else colours
            ax.scatter(x[beyond], np.full(int(beyond.sum()), edge), marker=marker, s=18,
                       c=cols, linewidths=0, zorder=5, clip_on=False)
            clipped += int(beyond.sum())
    ax.set_ylim(y0, y1)
    return clipped


def clipped_handle(n: int) -> Line2D:
    return Line2D([], [], color=GREY, marker="^", linestyle="none", markersize=5,
                  label=f"interval clipped at the axis ({n})")


# ---------------------------------------------------------------------------
# tooltips (SVG <title>) for the marks a rule cites by variant id

def variant_tooltips(audit: AuditFolder, frame: pd.DataFrame, value_column: str = "estimate",
                     se_column: str | None = "std_error") -> list[str]:
    """One line per row: variant id, value (s.e.) and its settings."""
    from ..labels import setting_name
    from ..summary import fmt
    out = []
    cols = [c for c in audit.setting_columns if c in frame.columns]
    for _, r in frame.iterrows():
        value = fmt(r[value_column])
        if se_column and se_column in frame.columns:
            value += f" (s.e. {fmt(r[se_column])})"
        settings = "; ".join(f"{setting_name(c)} {value_text(r[c])}" for c in cols)
        base = " (base)" if r["variant"] == audit.base_variant else ""
        out.append(f"variant {r['variant']}{base}: {value}; {settings}")
    return out


def attach_tooltips(ax, artist, texts) -> None:
    """Mark ``artist`` (a scatter of one mark per row) for SVG tooltips: the
    renderer adds a ``<title>`` with ``texts[i]`` to the i-th mark. The texts ride
    on the figure object, never on module state."""
    fig = ax.figure
    tips = fig.__dict__.setdefault("robustgmm_tooltips", {})
    gid = f"robustgmm-marks-{len(tips)}"
    artist.set_gid(gid)
    tips[gid] = list(texts)
