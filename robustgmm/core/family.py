"""The fit: one model, or a family of models that share their work.

Stages (each a function of the previous ones, so that siblings can share them):
one-step estimate → robust weight ``S`` at the one-step estimate → final estimate
per ``steps`` → final pass (Windmeijer terms, AR sums) → tests → variance
(:mod:`.covariance`) → :class:`FitResult`.

* iterated: the two-step update repeated with ``S`` from the latest residuals until
  the coefficients stop moving (Hansen, Heaton & Yaron 1996): every coefficient
  moves by less than ``ITERATION_TOL`` times its magnitude plus its uncorrected
  standard error (a criterion free of units); at most ``MAX_ITERATIONS`` updates.

Shared work (:func:`fit_family`): specs that differ only in ``steps``, ``errors``
and ``last_lag`` (same :func:`share_key`) share one engine. Its design is the
widest instrument set of the family (``last_lag = "all"`` when the members differ
in it); a member's moment matrices are sub-blocks of the engine's (the moments of a
subset of instrument columns are the corresponding rows and columns), its one-step
estimate and robust weight are computed once and reused by its two-step and
iterated siblings, and the passes of all members run together.

Settings that are invalid by construction (:func:`invalid_reason`) are input
errors: ``first_lag = 1``, and conventional errors with one-step system GMM.
"""
from __future__ import annotations

import dataclasses
import json
import math
from dataclasses import dataclass, field

import numpy as np

from ..data import Panel
from ..errors import EstimationError, InputError
from ..options import Equations, Errors, Steps, parse
from ..spec import Spec, canonical_settings, settings_of
from . import covariance, diagnostics, longrun, strength
from .design import Design
from .engine import MomentEngine
from .problem import FinalSums, GMMProblem, NotSubset, SumS, efficient_gmm
from .results import Counts, FitResult, TermEstimate, TestResult

ITERATION_TOL = 1e-10
MAX_ITERATIONS = 200

FIRST_LAG_REASON = (
    "first_lag = 1 is invalid: the level at t-1 of the outcome (and of an endogenous "
    "regressor) contains the shock of t-1, which is part of the transformed error at t; "
    "use first_lag >= 2")
CONVENTIONAL_SYSTEM_REASON = (
    "errors = \"conventional\" with one-step system GMM is invalid: the one-step weight "
    "is not proportional to the covariance of the stacked errors (the level errors "
    "contain the unit effect); use errors = \"robust\" or two-step weighting")


def invalid_reason(spec: Spec) -> str:
    """Why a spec is invalid by construction ('' when it is not). The one place this
    rule is evaluated: :func:`fit` raises it as an input error, the audit grid skips
    such variants with it."""
    if spec.first_lag < 2:
        return FIRST_LAG_REASON.replace("first_lag = 1", f"first_lag = {spec.first_lag}")
    # an own window starting at lag 1 is valid only for a predetermined regressor
    # (and an external instrument): for the outcome or an endogenous regressor the
    # level at t-1 is correlated with the transformed error (Arellano & Bond 1991)
    own = [(spec.outcome, spec.outcome_instrument_lags)]
    own += [(r.name, r.instrument_lags) for r in spec.regressors if r.role == "endogenous"]
    for name, window in own:
        if window is not None and window[0] < 2:
            return (f"{name}: instrument_lags starts at lag {window[0]}, but the level at "
                    "t-1 of the outcome or an endogenous regressor is correlated with the "
                    "transformed error: start at 2 or later")
    if (parse(Equations, spec.equations) == Equations.SYSTEM
            and parse(Steps, spec.steps) == Steps.ONE
            and parse(Errors, spec.errors) == Errors.CONVENTIONAL):
        return CONVENTIONAL_SYSTEM_REASON
    return ""


@dataclass
class _OneStep:
    """One-step estimate and what every sibling reuses (per instrument set)."""

    beta: np.ndarray
    A: np.ndarray
    bread: np.ndarray
    rank_a: int
    warnings: list
    S: np.ndarray = None
    ssr: float = 0.0
    W: np.ndarray = None
    rank_s: int = 0
    v_robust: np.ndarray = None
    sigma2: float = math.nan
    sargan: TestResult | None = None
    beta2: np.ndarray = None
    bread2: np.ndarray = None


@dataclass
class _Solution:
    """The final estimate of one (instrument set, steps) pair.

    ``weight`` is the weight that gave ``beta``; ``S_w`` the moment covariance whose
    inverse is the efficient weight of the Hansen test and of ``D``; ``rank_w`` its
    rank."""

    beta: np.ndarray
    beta_prev: np.ndarray
    weight: np.ndarray
    S_w: np.ndarray
    bread: np.ndarray
    rank_w: int
    iterations: int
    hansen: TestResult | None
    warnings: list = field(default_factory=list)
    task: FinalSums | None = None
    pinv_parts: tuple | None = None


def _one_step_stage(prob: GMMProblem) -> _OneStep:
    before = len(prob.warnings)
    beta1, A, bread1, rank_a = prob.one_step()
    return _OneStep(beta1, A, bread1, rank_a, prob.warnings[before:])


def _weight_stage(prob: GMMProblem, one: _OneStep) -> None:
    """Everything that follows from ``S`` at the one-step estimate."""
    d = prob.design
    K = prob.K
    one.W, one.rank_s = prob.weight_from(one.S)
    # robust one-step variance (clustered by unit)
    m1 = one.bread @ prob.zx.T @ one.A
    one.v_robust = m1 @ one.S @ m1.T
    n_t = d.n_rows[0]
    # σ² of the level error with a degrees-of-freedom correction: differenced errors
    # have variance 2σ² (H has 2 on its diagonal), deviations σ² (Arellano & Bover
    # 1995). With this divisor the Sargan statistic of Arellano & Bond (1991, Table 4
    # (a1)) is reproduced. K is the number of identified parameters.
    one.sigma2 = one.ssr / ((n_t - K) * (1.0 if d.fod else 2.0))
    one.sargan = diagnostics.sargan(prob, one)
    # the efficient estimate with S(b₁)⁻¹: the two-step estimate, and the estimate
    # whose minimised criterion is the Hansen J of a one-step fit
    one.beta2, one.bread2 = efficient_gmm(prob.zx, prob.zy, one.W)


def _hansen(prob, S_w, weight, rank_w, beta, warnings) -> TestResult | None:
    stat = diagnostics.criterion(prob.zx, prob.zy, weight, beta)
    return diagnostics.chi2(stat, rank_w - prob.K, diagnostics.criterion_scale(prob.zy, weight),
                            warnings, "Hansen J")


def _solution_stage(prob: GMMProblem, one: _OneStep, steps: Steps) -> _Solution:
    warns: list = []
    match steps:
        case Steps.ONE:
            # Hansen (1982): the minimised criterion of the efficient estimator with
            # the weight S(b₁)⁻¹, not the one-step estimate in that weight
            hansen = _hansen(prob, one.S, one.W, one.rank_s, one.beta2, warns)
            return _Solution(one.beta, one.beta, one.A, one.S, one.bread, one.rank_s, 1,
                             hansen, warns)
        case Steps.TWO | Steps.ITERATED:
            pass
        case other:
            raise ValueError(f"unknown steps {other!r}")
    beta_prev = one.beta
    S_w, rank_w, weight = one.S, one.rank_s, one.W
    beta, bread = one.beta2, one.bread2
    iterations = 2
    if steps == Steps.ITERATED:
        while iterations < MAX_ITERATIONS:
            S_next, _ = prob.unit_moments_at(beta)
            W_next, rank_next = prob.weight_from(S_next)
            beta_next, bread_next = efficient_gmm(prob.zx, prob.zy, W_next)
            iterations += 1
            beta_prev, S_w, weight, rank_w = beta, S_next, W_next, rank_next
            size = np.abs(beta) + np.sqrt(np.clip(np.diag(bread_next), 0, None))
            moved = np.max(np.abs(beta_next - beta) / np.where(size > 0, size, 1.0))
            beta, bread = beta_next, bread_next
            if moved < ITERATION_TOL:
                break
        else:
            warns.append(f"iterated GMM did not converge in {MAX_ITERATIONS} steps")
    hansen = _hansen(prob, S_w, weight, rank_w, beta, warns)
    return _Solution(beta, beta_prev, weight, S_w, bread, rank_w, iterations, hansen, warns)


def _difference_hansen(prob: GMMProblem, sol: _Solution, one: _OneStep,
                       groups=None) -> tuple[dict, list]:
    """difference-in-Hansen with the S of the solution (:func:`.diagnostics.difference_hansen`)
    for ``groups`` (None: every instrument group)."""
    warns: list = []
    if sol.S_w is one.S:
        # S of the one-step residuals: its inverse and efficient estimate exist already
        W, rank, b_full = one.W, one.rank_s, one.beta2
    else:  # iterated: the final weight is the inverse of S_w and gave the estimate
        W, rank, b_full = sol.weight, sol.rank_w, sol.beta
    return diagnostics.difference_hansen(prob, sol.S_w, W, rank, b_full, warns,
                                         groups), warns


def _assemble(spec: Spec, prob: GMMProblem, one: _OneStep, sol: _Solution,
              diff_hansen: tuple[dict, list], strength_tests: dict | None = None) -> FitResult:
    d = prob.design
    L, K = prob.L, prob.K
    steps, errors = parse(Steps, spec.steps), parse(Errors, spec.errors)
    diff_tests, diff_warns = diff_hansen
    warns = list(prob.warnings) + list(one.warnings) + list(sol.warnings) + list(diff_warns)
    if sol.rank_w < L:
        warns.append(
            f"the robust weight matrix is singular (rank {sol.rank_w} of {L} instruments; "
            f"{d.unit_has_rows.sum()} units); a generalised inverse was used and the Hansen "
            "test is weak")
    ar = sol.task.ar.acc
    influence = sol.bread @ prob.zx.T @ sol.weight
    inputs = covariance.Inputs(prob, one, sol)
    reported = covariance.estimator(steps, errors)
    robust = covariance.estimator(steps, Errors.ROBUST)
    v_robust = robust(inputs)
    vcov = v_robust if robust.kind == reported.kind else reported(inputs)
    vcov = 0.5 * (vcov + vcov.T)
    ar1 = diagnostics.ar_test(ar[1], influence, v_robust)
    ar2 = diagnostics.ar_test(ar[2], influence, v_robust)

    beta = sol.beta
    se = np.sqrt(np.clip(np.diag(vcov), 0, None))
    terms = []
    for label, b, s in zip(d.x_labels, beta, se):
        z = b / s if s > 0 else math.nan
        terms.append(TermEstimate(label, float(b), float(s), float(z), diagnostics.p_normal(z)))
    # long-run effects Σβ/(1 − Σρ), delta method on the reported covariance
    long_run, lr_warns = longrun.long_run_effects(spec, d.x_labels, beta, vcov)
    warns += lr_warns
    units = int(d.unit_has_rows.sum())
    counts = Counts(
        observations=d.n_rows[1] if d.system else d.n_rows[0],
        units=units,
        instruments=L,
        periods=int(d.sample_mask.any(axis=0).sum()),
        transformed_rows=d.n_rows[0],
        level_rows=d.n_rows[1],
        parameters=K,
        redundant_instruments=prob.redundant_time_moments,
    )
    if L > units:
        warns.append(f"{L} instruments outnumber the {units} units (common practice: keep "
                     "instruments at or below the number of units)")
    settings = dict(settings_of(spec))
    settings["iterations"] = sol.iterations
    return FitResult(
        terms=tuple(terms),
        std_error_kind=str(reported.kind),
        tests={"ar1": ar1, "ar2": ar2, "sargan": one.sargan, "hansen": sol.hansen},
        difference_hansen=diff_tests,
        counts=counts,
        warnings=tuple(dict.fromkeys(warns)),
        vcov=vcov,
        settings=settings,
        diagnostics={"windmeijer_d": inputs._d, "beta_one_step": one.beta,
                     "vcov_one_step_robust": one.v_robust, "sigma2": one.sigma2,
                     "redundant_time_moments": prob.redundant_time_moments},
        long_run=long_run,
        strength=strength_tests or {},
    )


def share_key(spec: Spec) -> str:
    """Specs with equal keys can share their work in :func:`fit_family`: they differ
    at most in ``steps``, ``errors`` and ``last_lag``. (Display fields such as the
    focus, thresholds or the sample's name do not enter the key.)"""
    key = {k: v for k, v in canonical_settings(spec).items()
           if k not in ("steps", "errors", "last_lag")}
    return json.dumps(key, sort_keys=True, separators=(",", ":"), default=str)


@dataclass(frozen=True)
class Parts:
    """Which optional parts of a fit to compute: ``strength`` (the instrument-strength
    statistics of :mod:`.strength`) and ``difference_hansen`` (the instrument groups
    whose difference-in-Hansen test is computed; None: every group). Leaving a part
    out changes nothing else in the fit: its sums ride on a pass without touching the
    others, and each difference-in-Hansen test depends on its own group only. The
    default computes everything; the Monte Carlo asks only for what it summarises."""

    strength: bool = True
    difference_hansen: tuple[str, ...] | None = None


ALL_PARTS = Parts()


def _fit_specs(specs, panel, chunk_units=None, memory_mb=None, engine=None,
               parts: Parts = ALL_PARTS) -> list:
    """Fit specs of one share group; a failing member gives its exception."""
    out: list = [None] * len(specs)
    bad = {i: invalid_reason(s) for i, s in enumerate(specs)}
    valid = [i for i, r in bad.items() if not r]
    for i, reason in bad.items():
        if reason:
            out[i] = InputError(f"{specs[i].source}: {reason}")
    if not valid:
        return out
    if len(valid) < len(specs):
        sub = _fit_specs([specs[i] for i in valid], panel, chunk_units, memory_mb, engine,
                         parts)
        for i, r in zip(valid, sub):
            out[i] = r
        return out
    if engine is None:
        lags = {s.last_lag for s in specs}
        wide = specs[0] if len(lags) == 1 else dataclasses.replace(specs[0], last_lag=None)
        try:
            engine = MomentEngine(Design(wide, panel), chunk_units, memory_mb)
        except EstimationError as exc:
            return [exc] * len(specs)
    # one problem per instrument set (last_lag); the engine's own design is reused
    problems: dict = {}
    for spec in specs:
        key = spec.last_lag
        if key in problems:
            continue
        try:
            design = engine.design if spec.last_lag == engine.design.spec.last_lag else None
            try:
                problems[key] = GMMProblem(spec, panel, engine=engine, design=design)
            except NotSubset:  # not expected for last_lag families; fit it on its own
                problems[key] = GMMProblem(spec, panel, chunk_units, memory_mb=memory_mb)
        except EstimationError as exc:
            problems[key] = exc
        except Exception as exc:  # noqa: BLE001 — one member's bug must not sink the others
            problems[key] = exc
    live = {k: p for k, p in problems.items() if isinstance(p, GMMProblem)}
    ones = {k: _one_step_stage(p) for k, p in live.items()}
    # the robust weight at every one-step estimate, in one pass per engine
    by_engine: dict = {}
    for k, p in live.items():
        by_engine.setdefault(id(p.engine), (p.engine, []))[1].append(k)
    # the sums of the instrument-strength statistics (they depend on the instrument
    # set only) ride on the same pass
    strong = ({k: strength.plan(live[k].spec, live[k], ones[k].A) for k in live}
              if parts.strength else {})
    for eng, keys in by_engine.values():
        tasks = {k: SumS(live[k], ones[k].beta) for k in keys}
        eng.run_pass(list(tasks.values()) + [strong[k][2] for k in keys if k in strong])
        for k, task in tasks.items():
            ones[k].S, ones[k].ssr = task.S, task.ssr
    for k, p in live.items():
        _weight_stage(p, ones[k])
    # final estimates per (instrument set, steps); iterated ones run their own passes
    sols: dict = {}
    for spec in specs:
        k, steps = spec.last_lag, parse(Steps, spec.steps)
        if k in live and (k, steps) not in sols:
            sols[(k, steps)] = _solution_stage(live[k], ones[k], steps)
    final_tasks: dict = {}
    for (k, steps), sol in sols.items():
        vectors = (covariance.windmeijer_vectors(live[k], sol)
                   if covariance.needs_windmeijer(steps) else [])
        sol.task = FinalSums(live[k], sol.beta, sol.beta_prev, vectors)
        final_tasks.setdefault(id(live[k].engine), (live[k].engine, []))[1].append(sol.task)
    for eng, tasks in final_tasks.values():
        eng.run_pass(tasks)
    # difference-in-Hansen depends on the instrument set and the S of the weight only:
    # one-step and two-step siblings share S (the one-step residuals), so compute once
    by_s: dict = {}
    diffs = {}
    for key, sol in sols.items():
        s_key = (key[0], id(sol.S_w))
        if s_key not in by_s:
            by_s[s_key] = _difference_hansen(live[key[0]], sol, ones[key[0]],
                                             parts.difference_hansen)
        diffs[key] = by_s[s_key]
    for i, spec in enumerate(specs):
        k = spec.last_lag
        if not isinstance(problems[k], GMMProblem):
            out[i] = problems[k]
            continue
        try:
            out[i] = _assemble(spec, live[k], ones[k], sols[(k, parse(Steps, spec.steps))],
                               diffs[(k, parse(Steps, spec.steps))],
                               strength.statistics(live[k], strong[k]) if k in strong else None)
        except Exception as exc:  # noqa: BLE001 — returned, the caller decides (its type says)
            out[i] = exc
    return out


def fit(spec: Spec, panel: Panel, *, chunk_units: int | None = None,
        memory_mb: float | None = None) -> FitResult:
    """Estimate one model (difference or system GMM) on a panel.

    ``chunk_units``: units per chunk (default: from the memory budget);
    ``memory_mb``: the memory budget (default :func:`.engine.memory_budget`).
    Raises :class:`InputError` for settings invalid by construction
    (:func:`invalid_reason`), :class:`EstimationError` (and its subclass
    :class:`UnderidentifiedError`) when the model cannot be estimated on the data.
    ``panel`` may also be a long DataFrame already in memory (one row per unit and
    period): it is checked and laid out as a data file would be
    (:func:`robustgmm.data.build_panel`).
    """
    if not isinstance(panel, Panel) and hasattr(panel, "columns") and hasattr(panel, "attrs"):
        from ..data import build_panel  # a frame in memory, validated like a data file
        panel = build_panel(panel, spec)
    res = _fit_specs([spec], panel, chunk_units, memory_mb)[0]
    if isinstance(res, BaseException):
        raise res
    return res


def fit_family(specs, panel: Panel, *, chunk_units: int | None = None,
               memory_mb: float | None = None, parts: Parts = ALL_PARTS) -> list:
    """Fit several specs on one panel, sharing work; returns, in order, a
    :class:`FitResult` or the exception that spec raised (never raises for one
    spec): :class:`EstimationError` for a model the data cannot estimate,
    :class:`InputError` for settings invalid by construction, anything else is a bug
    (the caller tells them apart by type).

    Specs are grouped by :func:`share_key`; within a group (specs differing only in
    steps, errors and last_lag) the moments are summed once for the widest
    instrument set, the one-step estimate and robust weight of each instrument set
    are computed once, and the passes over the data of all members run together.
    Results equal those of :func:`fit` on each spec: exactly for specs differing in
    steps and errors, to rounding (sums of the same terms, ordered differently) for
    specs differing in last_lag. ``parts``: the optional parts to compute
    (:class:`Parts`; default every one); the parts computed equal a full fit's.
    """
    specs = list(specs)
    out: list = [None] * len(specs)
    groups: dict = {}
    for i, s in enumerate(specs):
        groups.setdefault(share_key(s), []).append(i)
    for idx in groups.values():
        members = [specs[i] for i in idx]
        try:
            results = _fit_specs(members, panel, chunk_units, memory_mb, parts=parts)
        except Exception:  # noqa: BLE001 — e.g. a memory error: fall back spec by spec
            results = []
            for s in members:
                try:
                    results.append(_fit_specs([s], panel, chunk_units, memory_mb,
                                                  parts=parts)[0])
                except Exception as inner:  # noqa: BLE001
                    results.append(inner)
        for i, r in zip(idx, results):
            out[i] = r
    return out
