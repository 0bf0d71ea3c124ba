"""What the terminal shows: the plain-text summaries of ``fit``, ``audit`` (its
plan, its notes, its closing lines) and ``simulate``, in our own layout.

Text only: every function takes results already computed and returns lines; it
prints nothing, judges nothing (the verdicts come from :mod:`robustgmm.audit.verdicts`)
and knows nothing of argument parsing or exit codes (:mod:`robustgmm.cli`).
"""
from __future__ import annotations

import math
from collections import Counter
from pathlib import Path


# ---------------------------------------------------------------------------
# fit summary
# ---------------------------------------------------------------------------
def _num(x, width: int, digits: int) -> str:
    if x is None:
        return " " * (width - 1) + "-"
    try:
        x = float(x)
    except (TypeError, ValueError):
        return str(x).rjust(width)
    if not math.isfinite(x):
        return " " * (width - 1) + "-"
    return f"{x:{width}.{digits}f}"


def _p(x) -> str:
    if x is None or not math.isfinite(float(x)):
        return "      -"
    return "  <.001" if float(x) < 0.001 else f"{float(x):7.3f}"


#: The fit summary's test rows, in our own words, grouped by what they test.
TEST_GROUPS = (
    ("Over-identification", (("hansen", "Hansen J, robust weight"),
                             ("sargan", "Sargan, homoskedastic weight"))),
    ("Serial correlation of the differenced errors", (("ar1", "AR(1)"), ("ar2", "AR(2)"))),
)


#: Said under a Sargan statistic that has a number (Sargan 1958; Arellano & Bond 1991).
SARGAN_CONDITION = ("Sargan is chi-squared only if the errors are homoskedastic; Hansen J "
                    "does not need it.")


def test_block(result) -> list[str]:
    """The specification tests: 'Over-identification' (Hansen J with the robust
    weight, Sargan with the homoskedastic one), 'Serial correlation of the differenced
    errors' (AR(1), AR(2)) and 'Instrument groups (difference-in-Hansen)' with
    columns group, C, df, p."""
    def p_text(t):
        return _p(t.p_value).strip()

    out = []
    for heading, rows in TEST_GROUPS:
        shown = [(name, result.tests.get(key)) for key, name in rows
                 if result.tests.get(key) is not None]
        if not shown:
            continue
        width = max(len(n) for n, _ in shown)
        out += ["", heading, f"  {'':<{width}}  {'statistic':>10}  {'df':>4}  {'p':>7}"]
        for name, t in shown:
            if getattr(t, "reason", None):  # not computed validly: say why, show no number
                out.append(f"  {name:<{width}}  {t.reason}")
                continue
            df = "" if t.df is None else str(t.df)
            out.append(f"  {name:<{width}}  {_num(t.statistic, 10, 3)}  {df:>4}  "
                       f"{p_text(t):>7}")
        sargan = result.tests.get("sargan") if heading == "Over-identification" else None
        if sargan is not None and not getattr(sargan, "reason", None):
            # rule 4: a statistic shown with the condition under which it is chi-squared
            out.append(f"  {SARGAN_CONDITION}")
    groups = list(result.difference_hansen.items())
    if groups:
        width = max([len("group")] + [len(g) for g, _ in groups])
        out += ["", "Instrument groups (difference-in-Hansen)",
                f"  {'group':<{width}}  {'C':>10}  {'df':>4}  {'p':>7}"]
        for group, t in groups:
            if getattr(t, "reason", None):
                out.append(f"  {group:<{width}}  {t.reason}")
                continue
            df = "" if t.df is None else str(t.df)
            out.append(f"  {group:<{width}}  {_num(t.statistic, 10, 3)}  {df:>4}  "
                       f"{p_text(t):>7}")
    out += strength_block(result)
    return out


def strength_block(result) -> list[str]:
    """'Instrument strength': the Kleibergen-Paap rank test of underidentification
    (LM form, its p-value; the Wald form as F) per instrument set, and the conditional
    F of each GMM-instrumented term (robustgmm.core.strength)."""
    st = getattr(result, "strength", None) or {}
    lm, wald, cond = st.get("rank_lm", {}), st.get("rank_wald", {}), st.get("conditional_f", {})
    if not lm and not cond:
        return []
    out = ["", "Instrument strength (unit-clustered; underidentification: Kleibergen-Paap rank "
           "test, LM form)"]
    width = max([len("instruments")] + [len(n) for n in lm] + [len(n) for n in cond])
    out.append(f"  {'instruments':<{width}}  {'rank LM':>10}  {'df':>4}  {'p':>7}  {'Wald F':>8}")
    for name, t in lm.items():
        if t.reason:
            out.append(f"  {name:<{width}}  {t.reason}")
            continue
        w = wald.get(name)
        f = w.statistic / w.df if w is not None and w.df else float("nan")
        out.append(f"  {name:<{width}}  {_num(t.statistic, 10, 3)}  {t.df:>4}  "
                   f"{_p(t.p_value).strip():>7}  {_num(f, 8, 2)}")
    if cond:
        out.append(f"  conditional F (Sanderson-Windmeijer; F < 10 is weak by the rule of "
                   "thumb, common practice; no critical values for clustered GMM)")
        for name, t in cond.items():
            out.append(f"  {name:<{width}}  " + (t.reason if t.reason else
                                                 f"{_num(t.statistic, 10, 2)}  {t.df:>4}"))
    return out


def model_line(spec) -> str:
    """'orders on orders[t-1] and 2 regressors (staff_hours[t], flour_price[t])':
    what the outcome is regressed on, named by its terms so it cannot be misread."""
    ar = list(spec.ar_terms())
    others = [label for _, _, label in spec.regressor_terms()][len(ar):]
    text = f"{spec.outcome} on {' and '.join([', '.join(ar)] if ar else [])}"
    n = len(spec.regressors)
    if n:
        text += (f" and {n} regressor{'s' if n != 1 else ''} "
                 f"({', '.join(others)})" if others else "")
    return text


def own_windows_text(spec) -> str:
    """' (y: lags 2-4; x: lags 3-all, collapsed; external z: lags 2-all)': the
    variables with their own instrument window or form, and the external GMM-style
    instruments ('' when there are none)."""
    def window(lags, form):
        first, last = lags if lags is not None else (spec.first_lag, spec.last_lag)
        text = f"lags {first}-{'all' if last is None else last}" if lags is not None else ""
        return ", ".join(t for t in (text, form or "") if t)

    parts = []
    if spec.outcome_instrument_lags is not None or spec.outcome_instrument_form is not None:
        parts.append(f"{spec.outcome}: "
                     + window(spec.outcome_instrument_lags, spec.outcome_instrument_form))
    for r in spec.regressors:
        if r.role != "exogenous" and (r.instrument_lags is not None
                                      or r.instrument_form is not None):
            parts.append(f"{r.name}: " + window(r.instrument_lags, r.instrument_form))
    for g in spec.gmm_instruments:
        own = window(g.lags, g.form)
        parts.append(f"external {g.name}" + (f": {own}" if own else ""))
    return f" ({'; '.join(parts)})" if parts else ""


def format_fit_summary(spec, panel, result, all_terms: bool = False) -> str:
    """A compact plain-text summary of one fit (our own layout)."""
    from .options import CovarianceKind, Steps, Transform, label

    c = result.counts
    lines = [
        f"Model {spec.source}: {model_line(spec)}",
        f"{spec.equations} GMM, {label(Transform, spec.transform)}, "
        f"{label(Steps, spec.steps)}; instruments: lags {spec.first_lag}-"
        f"{'all' if spec.last_lag is None else spec.last_lag}, {spec.form}"
        + own_windows_text(spec)
        + ("; time effects" if spec.time_effects else ""),
        f"Sample: {spec.sample.name}; {c.observations} observations, {c.units} units, "
        f"{c.periods} periods; {c.instruments} instruments "
        f"({c.instruments_per_unit:.2f} per unit)",
    ]
    if panel is not None and panel.dropped_missing:
        lines.append(f"Rows with a missing value in a used column: {panel.dropped_missing} "
                     "(the observations they touch are left out)")
    kind = label(CovarianceKind, result.std_error_kind)
    lines += ["", f"Coefficients (standard errors: {kind})"]
    shown = [t for t in result.terms if all_terms or not t.label.startswith("period[")]
    hidden = len(result.terms) - len(shown)
    width = max([len("term")] + [len(t.label) for t in shown])
    lines.append(f"  {'term':<{width}}  {'estimate':>10}  {'std.error':>10}  {'z':>8}  {'p':>7}")
    for t in shown:
        lines.append(f"  {t.label:<{width}}  {_num(t.estimate, 10, 4)}  "
                     f"{_num(t.std_error, 10, 4)}  {_num(t.z, 8, 2)}  {_p(t.p_value)}")
    if hidden:
        lines.append(f"  ({hidden} period dummies not shown; use --all-terms or --json)")
    if result.long_run:
        lines += ["", "Long-run effects: sum of a regressor's coefficients / (1 - sum of the "
                  "autoregressive coefficients); delta-method standard errors"]
        width = max([len("term")] + [len(t.label) for t in result.long_run])
        for t in result.long_run:
            lines.append(f"  {t.label:<{width}}  {_num(t.estimate, 10, 4)}  "
                         f"{_num(t.std_error, 10, 4)}  {_num(t.z, 8, 2)}  {_p(t.p_value)}"
                         + (f"  ({t.reason})" if t.reason else ""))

    lines += test_block(result)
    if result.warnings:
        lines += ["", "Warnings"] + [f"  - {w}" for w in result.warnings]
    lines += ["", "Passing these tests does not prove the instruments valid; validity rests "
              "on economic reasoning about the model."]
    return "\n".join(lines)


# ---------------------------------------------------------------------------
# audit
# ---------------------------------------------------------------------------
def nothing_varied_note(spec) -> str:
    """The note for a model file without ``[audit.vary]``: nothing was varied, and
    the smallest ``[audit.vary]`` that makes a real audit (the two choices a referee
    asks about first: the equations and the instrument form, each against the
    model's own)."""
    other_eq = "difference" if str(spec.equations) == "system" else "system"
    other_form = "collapsed" if str(spec.form) == "per-period" else "per-period"
    return (f"robustgmm: note: {spec.source} has no [audit.vary], so nothing was varied: "
            "the audit has one variant and cannot judge robustness (every verdict is "
            "inconclusive). The smallest real audit tries the equations and the "
            "instrument form; add to the model file:\n"
            "  [audit.vary]\n"
            f"  equations = [\"{spec.equations}\", \"{other_eq}\"]\n"
            f"  form = [\"{spec.form}\", \"{other_form}\"]")


def plan_table(frame) -> str:
    """The plan (``audit --plan``) as a text table: every row and column, unwrapped."""
    import pandas as pd
    with pd.option_context("display.max_rows", None, "display.max_columns", None,
                           "display.width", 200, "display.max_colwidth", 60):
        return frame.to_string(index=False)


def plan_counts_line(frame) -> str | None:
    """The line after the plan table: '46 planned, 2 skipped; 3 duplicates of another
    variant (column duplicate_of)' (None for a plan without a status column)."""
    counts = frame["status"].value_counts() if "status" in frame else None
    if counts is None:
        return None
    dups = int((frame["duplicate_of"].fillna("") != "").sum()) \
        if "duplicate_of" in frame else 0
    return ("\n" + ", ".join(f"{n} {s}" for s, n in counts.items())
            + (f"; {dups} duplicate{'s' if dups != 1 else ''} of another variant "
               f"(column duplicate_of)" if dups else ""))


def run_notes(run: dict) -> list[str]:
    """The notes on how an audit ran (for stderr), from the manifest's ``run``:
    cache entries not written, no cache, workers capped, variants whose worker died."""
    notes = []
    if run.get("cache_write_errors"):
        notes.append(f"robustgmm: note: {run['cache_write_errors']} cache entries could not be "
                     "written; a rerun will estimate those variants again")
    if run.get("cache_unavailable"):
        notes.append(f"robustgmm: note: ran without a cache ({run['cache_unavailable']}); "
                     "an interrupted run of this audit cannot resume")
    if run.get("workers_capped"):
        notes.append(f"robustgmm: note: {run['workers_capped']}")
    if run.get("lost"):
        notes.append(f"robustgmm: note: {run['lost']} variant(s) lost their worker process "
                     "twice and are recorded as failed; a rerun tries them again")
    return notes


def run_line(run: dict, statuses=None) -> str:
    """The one line that closes every audit (on stdout, with or without a bar on
    stderr): '192 variants in 28.4 s: 184 estimated (12 from the cache), 8 skipped,
    0 failed'. ``statuses`` (the ``status`` column of variants.csv) gives the final
    classes: the runner counts a not-identified variant as failed, the audit records
    it as skipped, and the line must agree with the table."""
    n = run.get("variants", 0)
    wall = run.get("wall_seconds")
    took = f" in {wall:.1f} s" if isinstance(wall, (int, float)) else ""
    if statuses is None:
        return (f"{n} variant{'s' if n != 1 else ''}{took}: "
                f"{run.get('computed', 0)} estimated, {run.get('cached', 0)} from the cache, "
                f"{run.get('failed', 0)} failed")
    counts = Counter(str(v) for v in statuses)
    n = sum(counts.values())
    return (f"{n} variant{'s' if n != 1 else ''}{took}: {counts.get('ok', 0)} estimated "
            f"({run.get('cached', 0)} from the cache), {counts.get('skipped', 0)} skipped, "
            f"{counts.get('failed', 0)} failed")


def fragile_terms(verdict) -> list[str]:
    """The focus terms the verdict (its dict) calls fragile, in its order."""
    terms = (verdict or {}).get("terms", {}) if isinstance(verdict, dict) else {}
    return [label for label, v in terms.items()
            if isinstance(v, dict) and v.get("verdict") == "fragile"]


def audit_summary(verdict: dict, out: Path, fragile: list[str]) -> str:
    """What the terminal prints after an audit, read from the verdict (its dict, as in
    verdict.json; nothing is judged here): the base model's failure first, the counts
    by evidence class, then each focus term's verdict with its reason."""
    from .audit.verdicts import AuditVerdict
    verdict = AuditVerdict.from_dict(verdict)
    lines = []
    if not verdict.base_acceptable and verdict.base_statement:
        lines.append(verdict.base_statement + " Every verdict is therefore inconclusive.")
        closest = verdict.closest_acceptable
        if closest:
            changed = ", ".join(f"{k} = {v}" for k, v in (closest.get("changed") or {}).items())
            lines.append(f"Closest acceptable variant: {closest['variant']}"
                         + (f" ({changed})" if changed else ""))
    c = verdict.variants
    text = (f"{c.get('ok', 0)} estimated: {c.get('acceptable', 0)} acceptable, "
            f"{c.get('untestable', 0)} untestable, {c.get('rejected', 0)} rejected by their "
            f"tests")
    if c.get("duplicates"):
        text += f"; {c['duplicates']} duplicate{'s' if c['duplicates'] != 1 else ''} merged"
    extra = [f"{c[k]} {k}" for k in ("failed", "skipped") if c.get(k)]
    lines.append(text + (f" ({', '.join(extra)})" if extra else ""))
    for t in verdict.terms:
        lines.append(f"  {t.term}: {t.verdict} — {t.reason}")
    if fragile:
        lines.append("Fragile: " + ", ".join(fragile))
    lines.append(f"Wrote the audit to {out}")
    return "\n".join(lines)


# ---------------------------------------------------------------------------
# simulation
# ---------------------------------------------------------------------------
def simulation_summary(sim, out: Path) -> str:
    """The closing lines of ``robustgmm simulate``: the base model's behaviour per
    focus term and the run figures."""
    run = sim.run
    s = sim.summary
    lines = []
    for _, r in s[s["is_base"].astype(bool)].iterrows():
        lines.append(f"base model, {r['term']}: bias {r['bias']:+.3g} (sd {r['sd']:.3g}), "
                     f"coverage {r['coverage']:.0%}, {int(r['reps_ok'])}/{int(r['reps'])} "
                     "replications estimated")
    lines.append(f"{run['reps']} replications in {run['wall_seconds']:.1f} s: "
                 f"{run['computed']} run, {run['cached']} from the cache")
    lines.append(f"Wrote the simulation to {out}")
    return "\n".join(lines)
