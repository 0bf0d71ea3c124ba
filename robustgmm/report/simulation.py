"""The report section "How these estimators behave at this sample size", from the
optional simulation.csv and calibration.json of an audit folder (``audit
--simulate R``; :mod:`robustgmm.montecarlo.replicate`).

It reads only those files and the audit's own (never the GMM algebra): a table per
focus term ranked by RMSE with bias, SD, coverage and size; a figure of bias ± SD
per variant (sorted, base ringed, zero = the truth); a figure of coverage per
variant against the nominal 1 − alpha line with the ``min_coverage`` line; and a
referee-ready sentence. The simulated world is only as right as the model: it shows
how the estimators behave *if the model is true*, not that it is true.
"""
from __future__ import annotations

import json
import math
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any, Mapping

import numpy as np
import pandas as pd
from matplotlib.figure import Figure

from .. import contract
from .labels import setting_name, slug, value_text

READING = ("The simulated world is only as right as the model: these figures show how the "
           "estimators would behave if the base model (its coefficients, shocks and "
           "regressor processes, calibrated to the data) were the truth, not that it is. "
           "Statistical robustness is not proof of instrument validity.")


def coverage_mc_se(reps, alpha: float) -> float | None:
    """The binomial Monte Carlo standard error of a coverage at the nominal level
    1 - alpha from ``reps`` panels, sqrt(p (1 - p) / R); None without a count."""
    try:
        return math.sqrt((1 - alpha) * alpha / int(reps))
    except (TypeError, ValueError, ZeroDivisionError):
        return None


def columns_note(reps, alpha: float) -> str:
    """What each column of the ranking tables is, with the Monte Carlo standard error
    of a coverage at the nominal level, sqrt(p (1 - p) / R): with few panels 95% and
    100% are within noise of each other."""
    level = 1 - alpha
    se = coverage_mc_se(reps, alpha)
    mc = f"{100 * se:.1f} points" if se is not None else "sqrt(p (1 - p) / R)"
    return (f"The tables below rank the variants by RMSE. Columns: bias, the mean of "
            f"estimate minus truth; SD, the standard deviation "
            f"of the estimates across the panels; RMSE, the root mean squared error; "
            f"coverage, the share of panels whose {level:.0%} interval contains the truth "
            f"(its Monte Carlo standard error at the nominal level is about {mc} with "
            f"{reps} panels); size, the share rejecting the true value at {alpha:g}; SE "
            f"ratio, the mean reported standard error over SD (below 1: the reported "
            f"errors are too small; Windmeijer 2005); replications, the panels estimated "
            f"of those simulated.")


@dataclass(frozen=True)
class SimulationFolder:
    """simulation.csv and calibration.json of a folder."""

    summary: pd.DataFrame
    calibration: Mapping[str, Any]
    settings: tuple[str, ...] = ()
    thresholds: Mapping[str, Any] = field(default_factory=dict)


def read_simulation(folder, settings, thresholds=None) -> SimulationFolder | None:
    """The folder's simulation, or None when it has none. A damaged file is an
    :class:`InputError` naming it (one line per problem), like the other files."""
    from ..errors import InputError
    folder = Path(folder)
    path = folder / contract.SIMULATION.file
    if not path.exists():
        return None
    problems: list[str] = []
    frame = contract.read_table(contract.SIMULATION, path, list(settings), problems)
    cal_path = folder / contract.CALIBRATION_FILE
    calibration = None
    try:
        calibration = json.loads(cal_path.read_text())
    except FileNotFoundError:
        problems.append(f"{cal_path}: file missing (simulation.csv is there without it)")
    except (OSError, ValueError) as exc:
        problems.append(f"{cal_path}: cannot be read as JSON ({type(exc).__name__})")
    if isinstance(calibration, dict):
        missing = [k for k in contract.CALIBRATION_KEYS if k not in calibration]
        if missing:
            problems.append(f"{cal_path}: key {missing[0]!r} missing")
        elif calibration.get("format_version") != contract.FORMAT_VERSION:
            problems.append(f"{cal_path}: format_version {calibration.get('format_version')!r}, "
                            f"expected {contract.FORMAT_VERSION}")
    elif calibration is not None:
        problems.append(f"{cal_path}: not a JSON object")
    if problems:
        raise InputError(problems)
    frame = frame.assign(is_base=frame["is_base"].map(lambda v: str(v) == "True"))
    return SimulationFolder(frame, calibration, tuple(settings), dict(thresholds or {}))


# ---------------------------------------------------------------------------
# words
# ---------------------------------------------------------------------------
def variant_text(row: Mapping, settings) -> str:
    """The varied settings of a row in words: 'equations system, steps 2, ...'."""
    parts = [f"{setting_name(c)} {value_text(row.get(c))}" for c in settings]
    return ", ".join(parts) if parts else "the base model"


def _pct(x) -> str:
    return "n/a" if x is None or not np.isfinite(x) else f"{100 * x:.0f}%"


def _g(x, digits=2) -> str:
    return "n/a" if x is None or not np.isfinite(x) else f"{x:.{digits}g}"


def _term_rows(sim: SimulationFolder, term: str) -> pd.DataFrame:
    rows = sim.summary[sim.summary["term"] == term]
    return rows.sort_values(["rmse", "order"], kind="mergesort", na_position="last")


def _lead(sim: SimulationFolder, units: int | None) -> str:
    periods = len(sim.calibration.get("world", {}).get("periods", []) or [])
    size = f"{units:,} units and {periods} periods" if units else f"{periods} periods"
    return f"In {sim.calibration.get('reps')} panels simulated to look like these data ({size})"


def _clauses(sim: SimulationFolder, term: str) -> str:
    """The base model's bias and coverage for ``term`` and, when another variant has
    a lower RMSE, that variant's."""
    alpha = float(sim.calibration.get("alpha", 0.05))
    rows = _term_rows(sim, term)
    if rows.empty:
        return ""
    base = rows[rows["is_base"]]
    best = rows.iloc[0]

    def describe(r, who):
        b = float(r["bias"])
        if not np.isfinite(b):
            return f"{who} was never estimated"
        way = "overestimates" if b > 0 else "underestimates"
        return (f"{who} {way} {term} by {abs(b):.2g} on average (simulation SD "
                f"{_g(float(r['sd']))}) and its {1 - alpha:.0%} intervals cover the truth "
                f"{_pct(float(r['coverage']))} of the time")

    parts = []
    if len(base):
        parts.append(describe(base.iloc[0], "the base model"))
    if not len(base) or best["variant"] != base.iloc[0]["variant"]:
        parts.append(describe(best, "the most accurate variant by RMSE ("
                              + variant_text(best, sim.settings) + ")"))
    return "; ".join(parts)


def headline(sim: SimulationFolder, term: str, units: int | None) -> str:
    """The referee sentence for one term: the base model's bias and coverage, and
    the variant with the lowest RMSE."""
    body = _clauses(sim, term)
    return f"{_lead(sim, units)}, {body}." if body else ""


def referee_sentences(sim: SimulationFolder, focus, units: int | None) -> str:
    """One paragraph for referee.txt: the lead once, then each focus term."""
    items = [(t, _clauses(sim, t)) for t in focus]
    items = [(t, c) for t, c in items if c]
    if not items:
        return ""
    first, rest = items[0], items[1:]
    text = f"{_lead(sim, units)}, {first[1]}."
    for term, clause in rest:
        text += f" For {term}, {clause}."
    se = coverage_mc_se(sim.calibration.get("reps"), float(sim.calibration.get("alpha", 0.05)))
    if se is not None:  # few panels: 95% and 100% may be noise apart
        text += (f" With {sim.calibration.get('reps')} panels a coverage is known to within "
                 f"about {200 * se:.0f} percentage points (two Monte Carlo standard errors "
                 f"at the nominal level), and the ranking by RMSE carries the same noise.")
    return text + (" The simulated world is the base model taken as true; this says how the "
                   "estimators behave if the model is right, not that it is.")


def unreliable_count(sim: SimulationFolder) -> tuple[int, int]:
    """(variants firing ``unreliable_at_this_size``, variants simulated), with the
    audit's rule (:func:`robustgmm.audit.verdicts.rules.unreliable_at_this_size`)."""
    from ..audit.verdicts.rules import unreliable_at_this_size
    th = {"min_coverage": 0.85, "max_bias_sd": 0.5, **sim.thresholds}
    return len(unreliable_at_this_size(sim.summary, th)), int(sim.summary["variant"].nunique())


# ---------------------------------------------------------------------------
# figures
# ---------------------------------------------------------------------------
def _points_with_base(ax, rows, y, yerr, label):
    """One point per variant in ``rows``' order with its bar, the base model ringed,
    the variant ids as ticks (shared by the bias and coverage figures)."""
    from .figures.common import BLUE, GREY, VERMILLION, sizes, variant_ticks
    x = np.arange(len(rows))
    area, width = sizes(len(rows))
    ax.errorbar(x, y, yerr=yerr, fmt="none", ecolor=GREY, elinewidth=width)
    ax.scatter(x, y, s=area, color=BLUE, zorder=3, label=label)
    base = rows["is_base"].to_numpy(bool)
    if base.any():
        ax.scatter(x[base], y[base], s=area * 4, facecolors="none", edgecolors=VERMILLION,
                   linewidths=1.5, zorder=4, label="base model")
    variant_ticks(ax, rows["variant"].astype(str).tolist())


def plot_bias(ax, sim: SimulationFolder, term: str):
    """Bias ± one simulation SD per variant, sorted by bias; base ringed; the truth
    is the zero line."""
    from .figures.common import BLACK, style
    rows = sim.summary[(sim.summary["term"] == term) & sim.summary["bias"].notna()]
    rows = rows.sort_values(["bias", "order"], kind="mergesort")
    bias, sd = rows["bias"].to_numpy(float), rows["sd"].to_numpy(float)
    ax.axhline(0.0, color=BLACK, lw=0.8, ls="--", label="truth (zero bias)")
    _points_with_base(ax, rows, bias, np.nan_to_num(sd), "mean bias ± 1 simulation SD")
    ax.set_ylabel(f"bias of {term}")
    ax.legend(fontsize=7, loc="best", frameon=False)
    style(ax)
    return ax


def plot_coverage(ax, sim: SimulationFolder, term: str):
    """Coverage of the 1 − alpha intervals per variant (sorted), with the nominal line
    and the ``min_coverage`` line; two binomial Monte Carlo SEs as bars."""
    from .figures.common import BLACK, VERMILLION, style
    alpha = float(sim.calibration.get("alpha", 0.05))
    low = float(sim.thresholds.get("min_coverage", 0.85))
    rows = sim.summary[(sim.summary["term"] == term) & sim.summary["coverage"].notna()]
    rows = rows.sort_values(["coverage", "order"], kind="mergesort")
    cov = rows["coverage"].to_numpy(float)
    err = 2 * np.nan_to_num(rows["coverage_mc_se"].to_numpy(float))
    # A share lies in [0, 1]: the bars stop at the bounds rather than promise more.
    err = np.vstack([cov - np.clip(cov - err, 0.0, 1.0), np.clip(cov + err, 0.0, 1.0) - cov])
    ax.axhline(1 - alpha, color=BLACK, lw=0.8, ls="--", label=f"nominal {1 - alpha:.0%}")
    ax.axhline(low, color=VERMILLION, lw=0.8, ls=":", label=f"min_coverage {low:.0%}")
    _points_with_base(ax, rows, cov, err, "coverage ± 2 Monte Carlo SE")
    ax.set_ylim(min(0.0, float(np.nanmin(cov)) if len(cov) else 0.0) - 0.02, 1.02)
    ax.set_ylabel(f"coverage for {term}")
    ax.legend(fontsize=7, loc="lower right", frameon=False)
    style(ax)
    return ax


CAPTIONS = {
    "sim_bias": ("Each dot is one variant's mean bias for {term} over the simulated panels, "
                 "with a bar of one simulation SD either side; the dashed line is the truth. "
                 "Variants are sorted by bias and the ringed dot is the base model. A dot far "
                 "from the line relative to its bar is biased at this sample size (difference "
                 "GMM with persistent series is biased towards the within estimate, Blundell "
                 "& Bond 1998)."),
    "sim_coverage": ("Each dot is the share of simulated panels in which one variant's "
                     "{level} interval for {term} contains the truth, with two Monte Carlo "
                     "standard errors as bars; the dashed line is the nominal level, the "
                     "dotted line the min_coverage line of the unreliable_at_this_size "
                     "caution. Dots well below the nominal line have standard errors too "
                     "small (uncorrected two-step errors, Windmeijer 2005) or a biased "
                     "estimate."),
}


def render_simulation_figures(sim: SimulationFolder, out_dir, focus, *,
                              formats=("png", "svg", "pdf")) -> list:
    """Draw the bias and coverage figures of each focus term into ``out_dir``."""
    import matplotlib
    from .figures.render import FigureFile, _save
    out_dir = Path(out_dir)
    out_dir.mkdir(parents=True, exist_ok=True)
    made = []
    n = int(sim.summary["variant"].nunique())
    with matplotlib.rc_context({"svg.hashsalt": "robustgmm", "svg.fonttype": "path",
                                "pdf.fonttype": 42}):
        for term in focus:
            if not (sim.summary["term"] == term).any():
                continue
            for kind, title, draw in (
                    ("sim_bias", f"Bias ± SD at this sample size: {term}", plot_bias),
                    ("sim_coverage", f"Coverage at this sample size: {term}", plot_coverage)):
                fig = Figure(figsize=(9.0, 3.2 + 0.004 * n))
                draw(fig.add_subplot(), sim, term)
                name = f"{kind}_{slug(term)}"
                png, paths = _save(fig, out_dir, name, formats)
                made.append(FigureFile(name, title, kind, term, png, tuple(paths)))
    return made


# ---------------------------------------------------------------------------
# the section's context (HTML and Markdown)
# ---------------------------------------------------------------------------
def _world_value(value) -> str:
    """A calibration.json parameter value as table text: a number, a per-period
    list as its range, the unit heteroskedasticity as the spread of its multipliers."""
    if value is None:
        return "off"
    if isinstance(value, bool) or isinstance(value, str):
        return str(value)
    if isinstance(value, (int, float)):
        return _g(float(value), 3)
    if isinstance(value, list):
        nums = [float(v) for v in value if isinstance(v, (int, float))]
        if not nums:
            return "n/a"
        if max(nums) == min(nums):
            return f"{_g(nums[0], 3)} in every period"
        return f"{_g(min(nums), 3)} to {_g(max(nums), 3)} over {len(nums)} periods"
    if isinstance(value, dict) and "sd" in value:
        return f"unit multipliers with SD {_g(float(value['sd']), 2)}"
    return "n/a"


#: How to read the simulated-world table, shown under it in every document.
WORLD_NOTE = ("Each parameter as calibrated to these data, and as the same calibration "
              "finds it in one simulated panel. The second is one draw, so it differs from "
              "the first by sampling noise; a gap well beyond that (often the variance of a "
              "nearly non-stationary regressor) marks a parameter the calibration does not "
              "recover at this sample size, where the simulated world is less like these "
              "data.")


def world_rows(calibration: Mapping[str, Any]) -> list[dict]:
    """The parameters of the simulated world (calibration.json): name, the value
    calibrated to the data, the same calibration re-run on a simulated panel
    (replication 0: it differs from the first by sampling noise; a gap well beyond
    that marks a parameter the method does not recover at this size) and how it was
    estimated."""
    params = calibration.get("world", {}).get("parameters", {})
    return [{"name": name, "value": _world_value(p.get("value")),
             "simulated": _world_value(p.get("simulated")) if "simulated" in p else "",
             "method": str(p.get("method", ""))}
            for name, p in params.items() if isinstance(p, dict)]


def section_context(sim: SimulationFolder, figures, focus, units: int | None) -> dict:
    """Everything the HTML partial and the Markdown section show."""
    import base64
    alpha = float(sim.calibration.get("alpha", 0.05))
    tables = []
    for term in focus:
        rows = _term_rows(sim, term)
        if rows.empty:
            continue
        body = []
        for r in rows.to_dict("records"):
            body.append({"variant": str(r["variant"]), "base": bool(r["is_base"]),
                         "settings": variant_text(r, sim.settings),
                         "bias": _g(r["bias"]), "sd": _g(r["sd"]), "rmse": _g(r["rmse"]),
                         "coverage": _pct(r["coverage"]), "size": _pct(r["size"]),
                         "se_ratio": _g(r["se_ratio"]),
                         "reps": f"{int(r['reps_ok'])}/{int(r['reps'])}"})
        tables.append({"term": term, "truth": _g(float(rows["true_value"].iloc[0]), 4),
                       "rows": body, "sentence": headline(sim, term, units)})
    fired, total = unreliable_count(sim)
    world = sim.calibration.get("world", {})
    return {
        "reps": sim.calibration.get("reps"), "seed": sim.calibration.get("seed"),
        "level": f"{1 - alpha:.0%}", "tables": tables,
        "initial": world.get("initial_method", ""),
        "truth_source": sim.calibration.get("truth_source", ""),
        "unreliable": f"{fired} of {total} variants", "reading": READING,
        "world": world_rows(sim.calibration),
        "world_note": WORLD_NOTE,
        "columns": columns_note(sim.calibration.get("reps"), alpha),
        "figures": [{"name": f.name, "title": f.title,
                     "caption": CAPTIONS[f.kind].format(term=f.term, level=f"{1 - alpha:.0%}"),
                     "data": base64.b64encode(f.png).decode("ascii"),
                     "png": f"figures/{f.name}.png",
                     "files": ", ".join(f"figures/{p.name}" for p in f.paths)}
                    for f in figures],
    }


def markdown_section(ctx: dict) -> str:
    """The section in Markdown (the same content as the HTML partial)."""
    def esc(text) -> str:
        return str(text).replace("|", "\\|").replace("*", "\\*").replace("_", "\\_")
    lines = ["## How these estimators behave at this sample size", "",
             f"{ctx['reps']} panels simulated to look like these data (seed {ctx['seed']}; "
             f"truth: {esc(ctx['truth_source'])}; initial conditions: {esc(ctx['initial'])}). "
             f"The caution unreliable\\_at\\_this\\_size fires for {ctx['unreliable']}.", "",
             f"*{esc(ctx['reading'])}*", ""]
    if ctx.get("world"):
        lines += ["### The simulated world", "",
                  f"{esc(ctx['world_note'])} Source: calibration.json.", "",
                  "| parameter | from the data | in a simulated panel | how estimated |",
                  "|---|---|---|---|"]
        lines += [f"| {esc(r['name'])} | {r['value']} | {r['simulated']} | {esc(r['method'])} |"
                  for r in ctx["world"]]
        lines.append("")
    lines += [esc(ctx["columns"]), ""]
    for t in ctx["tables"]:
        lines += [f"### {esc(t['term'])} (true value in the simulated world {t['truth']})", "", esc(t["sentence"]), "",
                  f"| rank | variant | settings | bias | SD | RMSE | coverage ({ctx['level']}) "
                  "| size | SE ratio | replications |",
                  "|---|---|---|---|---|---|---|---|---|---|"]
        for k, r in enumerate(t["rows"], 1):
            vid = f"**{r['variant']}** (base)" if r["base"] else r["variant"]
            lines.append(f"| {k} | {vid} | {esc(r['settings'])} | {r['bias']} | {r['sd']} | "
                         f"{r['rmse']} | {r['coverage']} | {r['size']} | {r['se_ratio']} | "
                         f"{r['reps']} |")
        lines.append("")
    for f in ctx["figures"]:
        lines += [f"![{esc(f['title'])}]({f['png']})", "", f"*How to read:* {esc(f['caption'])}", ""]
    return "\n".join(lines)
