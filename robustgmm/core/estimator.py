"""One-step, two-step and iterated GMM for dynamic panels, with diagnostics.

Notation (sums over units ``i``; ``Z_i`` instruments, ``X_i`` regressors, ``y_i``
outcome, stacked over the transformed and, in system GMM, the level equation):

* one-step (Arellano & Bond 1991, eq. (4)–(5)): ``A = (Σ Z_i' H Z_i)⁻¹``,
  ``b₁ = (X'Z A Z'X)⁻¹ X'Z A Z'y``;
* two-step (Hansen 1982; Arellano & Bond 1991): ``S = Σ Z_i' e₁ᵢ e₁ᵢ' Z_i`` from the
  one-step residuals, ``W = S⁻¹``, ``b₂ = (X'Z W Z'X)⁻¹ X'Z W Z'y``;
* iterated: the two-step update repeated with ``S`` from the latest residuals until
  the coefficients stop moving (Hansen, Heaton & Yaron 1996).

Standard errors: conventional ``σ² (X'ZAZ'X)⁻¹`` (one-step) or ``(X'ZWZ'X)⁻¹``
(two-step); cluster-robust by unit for one-step,
``(X'ZAZ'X)⁻¹ X'ZA S A Z'X (X'ZAZ'X)⁻¹``; Windmeijer (2005, eq. (3.4)) corrected for
two-step, ``V₂ + D V₂ + V₂ D' + D V₁ D'`` with ``D = ∂b₂/∂b₁``.

Passes over the data. A fit reads the units three times (a fourth and more for
iterated weights): the first moments (``Z'X``, ``Z'y``, ``Z'HZ``, ``X'X``); the
robust weight ``S`` at the one-step estimate; and a final pass for the Windmeijer
term and the AR(m) sums. A :class:`MomentEngine` runs the passes over chunks of
units whose size follows a memory budget (:func:`memory_budget`), keeping the
prepared chunks between passes only while they all fit in half the budget.

Shared work (:func:`fit_family`): specs that differ only in ``steps``, ``errors``
and ``last_lag`` (same :func:`share_key`) share one engine. Its design is the
widest instrument set of the family (``last_lag = "all"`` when the members differ
in it); a member's moment matrices are sub-blocks of the engine's (the moments of a
subset of instrument columns are the corresponding rows and columns), its one-step
estimate and robust weight are computed once and reused by its two-step and
iterated siblings, and the passes of all members run together.
"""
from __future__ import annotations

import dataclasses
import json
import math
import os
import warnings as _warnings
from dataclasses import dataclass, field

import numpy as np
from scipy import special

from ..data import Panel
from ..errors import EstimationError, UnderidentifiedError
from ..spec import Spec, canonical_settings, is_deterministic_label, settings_of
from .design import Design
from .linalg import independent_columns, inverse_or_pinv, sym_pinv
from .moments import (ARSums, Layout, first_moments, prepare, residual_rows,
                      unit_moments_t, windmeijer_term)
from .results import Counts, FitResult, TermEstimate, TestResult

#: Memory the core's chunk arrays may use, in MB (override with the environment
#: variable ``ROBUSTGMM_MEMORY_MB`` or the ``memory_mb`` argument of :func:`fit`).
DEFAULT_MEMORY_MB = 1024
MEMORY_ENV = "ROBUSTGMM_MEMORY_MB"
#: Largest working set of one chunk: about the size of a processor's last-level
#: cache, so that the several passes of a kernel over a chunk's arrays hit the
#: cache (measured: 20–25% faster than chunks of hundreds of MB; 24–48 MB alike).
CHUNK_WORKING_BYTES = 48 * 2**20
ITERATION_TOL = 1e-10
MAX_ITERATIONS = 200


def memory_budget(memory_mb: float | None = None) -> int:
    """The memory budget in bytes: ``memory_mb``, else ``$ROBUSTGMM_MEMORY_MB``, else
    :data:`DEFAULT_MEMORY_MB`. A value that is not a positive number is an error."""
    source = "memory_mb"
    if memory_mb is None:
        env = os.environ.get(MEMORY_ENV)
        if env not in (None, ""):
            source = MEMORY_ENV
            try:
                memory_mb = float(env)
            except ValueError:
                memory_mb = math.nan
        else:
            memory_mb = DEFAULT_MEMORY_MB
    if not (isinstance(memory_mb, (int, float)) and math.isfinite(memory_mb) and memory_mb > 0):
        raise ValueError(f"{source} must be a positive number of megabytes, not {memory_mb!r}")
    return int(memory_mb * 2**20)


class ChunkSource:
    """Yields the design's chunks of units in kernel layout (:mod:`.moments`).

    Chunk size: the smaller of a quarter of the memory budget and
    :data:`CHUNK_WORKING_BYTES`, divided by the bytes one unit needs while its chunk
    is built and passed over. Prepared chunks are kept between
    passes while the kept ones fit in half the budget; the others are rebuilt on
    each pass. Either way the core's arrays stay within the budget, whatever the
    number of units.
    """

    def __init__(self, design: Design, layout: Layout, chunk_units: int | None = None,
                 budget: int | None = None):
        self.design = design
        self.layout = layout
        budget = memory_budget() if budget is None else int(budget)
        N = design.panel.n_units
        prepared, working = layout.bytes_per_unit(len(design.extra_terms))
        if chunk_units is None:
            chunk_units = max(1, min(budget // 4, CHUNK_WORKING_BYTES) // working)
        self.chunk_units = max(1, min(int(chunk_units), max(N, 1)))
        self.ranges = [(lo, min(lo + self.chunk_units, N)) for lo in range(0, N, self.chunk_units)]
        self.budget = budget
        self.cache_limit = budget // 2
        self.cached_bytes = 0
        self.builds = 0
        self._cache: dict[int, object] = {}

    @property
    def keep(self) -> bool:
        """Whether every chunk is kept between passes (after the first pass)."""
        return len(self._cache) == len(self.ranges)

    def __iter__(self):
        for pos, (lo, hi) in enumerate(self.ranges):
            pc = self._cache.get(pos)
            if pc is None:
                pc = prepare(self.design.chunk(lo, hi), self.layout)
                self.builds += 1
                size = pc.nbytes
                if self.cached_bytes + size <= self.cache_limit:
                    self._cache[pos] = pc
                    self.cached_bytes += size
            yield pc


class _PassContext:
    """Per-chunk memo of one pass: residual rows per coefficient vector and
    ``G'`` per (problem, coefficient vector), so that family members that need the
    same arrays compute them once."""

    def __init__(self, pc, layout):
        self.pc = pc
        self.layout = layout
        self._resid: dict = {}
        self._gt: dict = {}
        self._diffs = None
        self._buf = None  # scratch for the entry-wise products, reused within the pass

    def resid(self, beta_all):
        key = beta_all.tobytes()
        out = self._resid.get(key)
        if out is None:
            out = self._resid[key] = residual_rows(self.pc, beta_all)
        return out

    def scratch(self):
        """A (W, n) scratch array, allocated once per chunk and pass."""
        if self._buf is None:
            self._buf = np.empty_like(self.pc.ZT)
        return self._buf

    def level_differences(self):
        if self._diffs is None:
            self._diffs = self.pc.level_differences()
        return self._diffs

    def gt(self, prob, beta):
        key = (id(prob), beta.tobytes())
        out = self._gt.get(key)
        if out is None:
            out = self._gt[key] = unit_moments_t(self.pc, self.layout,
                                                 self.resid(prob.beta_all(beta)), prob.scatter,
                                                 self.scratch())
        return out


class MomentEngine:
    """Chunked passes over the units of one design (the widest of a family)."""

    def __init__(self, design: Design, chunk_units: int | None = None,
                 memory_mb: float | None = None):
        self.design = design
        self.layout = Layout(design)
        self.source = ChunkSource(design, self.layout, chunk_units, memory_budget(memory_mb))
        self.passes = 0
        self._first = None
        self._keep_x = None
        self._independent: dict = {}

    def first(self):
        """``Z'X``, ``Z'y``, ``Z'HZ`` (every design column) and ``X'X``, summed once."""
        if self._first is None:
            lay = self.layout
            zx = np.zeros((lay.L, lay.K)); zy = np.zeros(lay.L)
            zhz = np.zeros((lay.L, lay.L)); xx = np.zeros((lay.K, lay.K))
            for pc in self.source:
                a, b, c, e = first_moments(pc, lay)
                zx += a; zy += b; zhz += c; xx += e
            self.passes += 1
            self._first = (zx, zy, zhz, xx)
        return self._first

    def keep_x(self) -> np.ndarray:
        if self._keep_x is None:
            self._keep_x = independent_columns(self.first()[3])
        return self._keep_x

    def independent_among(self, cols: np.ndarray) -> np.ndarray:
        """The columns ``cols`` that :func:`independent_columns` keeps on ``X'X``
        restricted to them (memoised: siblings of a family ask the same)."""
        key = tuple(int(c) for c in cols)
        if key not in self._independent:
            xx = self.first()[3]
            self._independent[key] = cols[independent_columns(xx[np.ix_(cols, cols)])]
        return self._independent[key]

    def run_pass(self, tasks) -> None:
        """One pass over the chunks; each task is called with the chunk's context."""
        for pc in self.source:
            ctx = _PassContext(pc, self.layout)
            for task in tasks:
                task(ctx)
        self.passes += 1


class _NotSubset(Exception):
    """A member's instrument columns are not all in the engine's design."""


def _column_map(member: Design, engine: Design) -> np.ndarray:
    if member is engine:
        return np.arange(member.L_all)
    where = {(c.group, c.equation, c.description): j for j, c in enumerate(engine.z_columns)}
    try:
        return np.asarray([where[(c.group, c.equation, c.description)]
                           for c in member.z_columns], dtype=np.int64)
    except KeyError:
        raise _NotSubset() from None


class _SumS:
    """Task: ``S = Σ g_i g_i'`` and the transformed-equation sum of squared residuals."""

    def __init__(self, prob, beta):
        self.prob, self.beta = prob, beta
        self.S = np.zeros((prob.L, prob.L))
        self.ssr = 0.0

    def __call__(self, ctx):
        gt = ctx.gt(self.prob, self.beta)
        self.S += gt @ gt.T
        resid = ctx.resid(self.prob.beta_all(self.beta))
        self.ssr += float((resid[ctx.layout.transformed_slots] ** 2).sum())


class _FinalSums:
    """Task: Windmeijer term ``T`` (when asked) and the AR(m) sums at ``beta``."""

    def __init__(self, prob, beta, beta_prev, weight, need_windmeijer):
        self.prob, self.beta, self.beta_prev = prob, beta, beta_prev
        self.need = need_windmeijer
        ze = prob.zy - prob.zx @ beta
        self.a = weight @ ze
        self.a_all = prob.spread(self.a)
        self.T = np.zeros((prob.L, prob.K))
        self.ar = ARSums(prob.L, prob.K)

    def __call__(self, ctx):
        prob = self.prob
        gt = ctx.gt(prob, self.beta)
        if self.need:
            gtp = ctx.gt(prob, self.beta_prev)
            self.T += windmeijer_term(ctx.pc, ctx.layout, gtp, self.a, self.a_all,
                                      prob.scatter, prob.keep_x, ctx.scratch())
        # AR(m): differenced level residuals (Arellano & Bond 1991, eq. (8))
        self.ar.add(ctx.pc, prob.beta_all(self.beta), prob.keep_x, gt, ctx.level_differences())


class GMMProblem:
    """The moment sums of one model and the estimators built on them.

    ``engine``: a :class:`MomentEngine` to share (its design must contain every
    instrument column of this model); by default the problem has its own.
    """

    def __init__(self, spec: Spec, panel: Panel, chunk_units: int | None = None, *,
                 engine: MomentEngine | None = None, memory_mb: float | None = None,
                 design: Design | None = None):
        self.spec = spec
        self.design = design if design is not None else Design(spec, panel)
        if engine is None:
            engine = MomentEngine(self.design, chunk_units, memory_mb)
        self.engine = engine
        self.source = engine.source
        self._cmap = _column_map(self.design, engine.design)
        self.warnings: list[str] = []
        self._first_pass()

    # ---------------------------------------------------------------- passes
    def _first_pass(self):
        d = self.design
        zx, zy, zhz, xx = self.engine.first()
        K = len(d.x_labels_all)
        keep_x = self.engine.keep_x()
        dropped = [d.x_labels_all[j] for j in range(K) if j not in set(keep_x.tolist())]
        bad = [lab for lab in dropped if not is_deterministic_label(lab)]
        if bad:
            raise EstimationError(
                "regressor(s) with no independent variation after the transform: "
                f"{', '.join(bad)} (constant within every unit, or collinear with other regressors)")
        # the time effects lose one column among themselves (the base period); any
        # further dummy dropped is taken by a regressor and is worth a warning
        det = np.asarray([j for j in range(K) if is_deterministic_label(d.x_labels_all[j])], dtype=int)
        if det.size:
            alone = set(self.engine.independent_among(det).tolist())
            taken = [d.x_labels_all[j] for j in sorted(alone - set(keep_x.tolist()))]
            if taken:
                self.warnings.append(
                    f"{', '.join(taken)} dropped: collinear with the regressors "
                    "(a regressor repeats the time effects)")
        d.set_kept_columns(keep_x)
        nonzero = np.diag(zhz)[self._cmap] > 0
        d.keep_z = np.asarray([j for j in d.keep_z if nonzero[j]], dtype=int)
        kz, kx = d.keep_z, d.keep_x
        cols = self._cmap[kz]  # kept instruments, as engine columns
        self.engine_cols = cols
        self.keep_x = np.asarray(kx, dtype=np.int64)
        self.zx = zx[np.ix_(cols, kx)]
        self.zy = zy[cols]
        self.zhz = zhz[np.ix_(cols, cols)]
        self.L, self.K = len(kz), len(kx)
        self.K_all = K
        self.scatter = self.engine.layout.scatter_rows(cols)
        n_rows = d.n_rows[0] + d.n_rows[1]
        if d.n_rows[0] <= self.K:
            raise UnderidentifiedError(
                f"only {d.n_rows[0]} observations in the transformed equation for {self.K} "
                "parameters: too few observations for this model")
        if self.L >= n_rows:
            raise EstimationError(
                f"{self.L} instruments for only {n_rows} observations: reduce last_lag, "
                "use collapsed instruments or add data")
        if self.L < self.K:
            raise UnderidentifiedError(
                f"fewer instruments ({self.L}) than parameters ({self.K}): the model is not identified")

    def beta_all(self, beta):
        """Coefficients spread over every design column (zero for dropped ones)."""
        out = np.zeros(self.K_all)
        out[self.keep_x] = beta
        return out

    def spread(self, a):
        """An instrument-space vector spread over every engine column."""
        out = np.zeros(self.engine.layout.L)
        out[self.engine_cols] = a
        return out

    def unit_moments_at(self, beta):
        """Σ g g' and the transformed-equation sum of squared residuals, at ``beta``."""
        task = _SumS(self, beta)
        self.engine.run_pass([task])
        return task.S, task.ssr

    # ------------------------------------------------------------- estimators
    def one_step(self):
        A, rank = sym_pinv(self.zhz)
        if rank < self.L:
            self.warnings.append(
                f"one-step weight matrix is singular (rank {rank} of {self.L} instruments); "
                "a pseudo-inverse was used")
        beta, bread_inv = efficient_gmm(self.zx, self.zy, A)
        return beta, A, bread_inv, rank

    def two_step_from(self, beta_prev):
        """The two-step estimate with the weight built from the residuals at ``beta_prev``."""
        S, _ = self.unit_moments_at(beta_prev)
        W, rank = sym_pinv(S)
        beta, bread_inv = efficient_gmm(self.zx, self.zy, W)
        return beta, W, S, bread_inv, rank

    def final_pass(self, beta, beta_prev, weight, need_windmeijer):
        """Windmeijer terms and Arellano–Bond AR(m) sums at the final estimate.

        Windmeijer (2005): with ``a = W Z'e`` (final residuals) and per-unit
        ``g_i = Z_i' e_i(b_prev)``, ``q_ik = Z_i' x_ik``, the derivative of ``S`` along
        ``b_k`` applied to ``a`` is ``Σ_i q_ik (g_i'a) + g_i (q_ik'a)``; summed block by
        block (:func:`.moments.windmeijer_term`; no n×L×K or L×L×K array).
        """
        task = _FinalSums(self, beta, beta_prev, weight, need_windmeijer)
        self.engine.run_pass([task])
        return task.T, task.ar.acc


def _p_normal(z):
    # 2·(1 − Φ(|z|)); scipy.special.ndtr is what scipy.stats.norm.sf calls, without
    # the distribution machinery (about 100 µs a call, thousands of calls an audit)
    return float(2 * special.ndtr(-abs(z))) if np.isfinite(z) else math.nan


def _chi2(stat, df):
    """A chi-squared test; None when it has no degrees of freedom (an exactly or
    under-identified instrument set has nothing to test)."""
    if df is None or df <= 0:
        return None
    if not np.isfinite(stat):
        return TestResult(float(stat), math.nan, int(df))
    # upper tail of χ²(df): scipy.special.chdtrc, as in scipy.stats.chi2.sf
    return TestResult(float(stat), float(special.chdtrc(df, stat)), int(df))


def efficient_gmm(zx, zy, weight):
    """``b = (X'Z W Z'X)⁻¹ X'Z W Z'y`` and ``(X'Z W Z'X)⁻¹``."""
    xzw = zx.T @ weight
    bread = xzw @ zx
    bread_inv = inverse_or_pinv(bread)
    return bread_inv @ (xzw @ zy), bread_inv


def hansen_statistic(zx, zy, weight, beta):
    ze = zy - zx @ beta
    return float(ze @ weight @ ze)


def _ar_test(acc, influence, vcov):
    """Arellano & Bond (1991, eq. (8)) m-statistic, with the estimator's influence
    ``M`` (``b - β ≈ M Σ Z_i'e_i``) and covariance ``V``:
    ``m = Σ s_i / sqrt(Σ s_i² − 2 w'X M Σ g_i s_i + w'X V X'w)``, ``s_i = w_i'u_i``."""
    if acc["pairs"] == 0:
        return None
    wx = acc["wx"]
    var = acc["s2"] - 2.0 * wx @ influence @ acc["gs"] + wx @ vcov @ wx
    if not var > 0:
        return TestResult(math.nan, math.nan, None)
    z = acc["s"] / math.sqrt(var)
    return TestResult(float(z), _p_normal(z), None)


# ---------------------------------------------------------------------------
# the fit, in stages that a family of specs can share
# ---------------------------------------------------------------------------
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
    """The final estimate of one (instrument set, steps) pair."""

    beta: np.ndarray
    beta_prev: np.ndarray
    weight: np.ndarray
    S_w: np.ndarray
    bread: np.ndarray
    rank_w: int
    iterations: int
    hansen: TestResult
    warnings: list = field(default_factory=list)
    task: _FinalSums | None = None


def _one_step_stage(prob: GMMProblem) -> _OneStep:
    before = len(prob.warnings)
    beta1, A, bread1, rank_a = prob.one_step()
    return _OneStep(beta1, A, bread1, rank_a, prob.warnings[before:])


def _weight_stage(prob: GMMProblem, one: _OneStep, need_two_step: bool) -> None:
    """Everything that follows from ``S`` at the one-step estimate."""
    d = prob.design
    K = prob.K
    one.W, one.rank_s = sym_pinv(one.S)
    # robust one-step variance (clustered by unit)
    m1 = one.bread @ prob.zx.T @ one.A
    one.v_robust = m1 @ one.S @ m1.T
    n_t = d.n_rows[0]
    # σ² of the level error with a degrees-of-freedom correction: differenced errors
    # have variance 2σ² (H has 2 on its diagonal), deviations σ² (Arellano & Bover
    # 1995). With this divisor the Sargan statistic of Arellano & Bond (1991, Table 4
    # (a1)) is reproduced.
    one.sigma2 = one.ssr / ((n_t - K) * (1.0 if d.fod else 2.0))
    ze1 = prob.zy - prob.zx @ one.beta
    one.sargan = (_chi2(float(ze1 @ one.A @ ze1) / one.sigma2, one.rank_a - K)
                  if one.sigma2 > 0 else None)
    if need_two_step:
        one.beta2, one.bread2 = efficient_gmm(prob.zx, prob.zy, one.W)


def _solution_stage(prob: GMMProblem, one: _OneStep, steps) -> _Solution:
    K = prob.K
    if steps == 1:
        ze1 = prob.zy - prob.zx @ one.beta
        return _Solution(one.beta, one.beta, one.A, one.S, one.bread, one.rank_s, 1,
                         _chi2(float(ze1 @ one.W @ ze1), one.rank_s - K))
    beta_prev = one.beta
    S_w, rank_w, weight = one.S, one.rank_s, one.W
    beta, bread = one.beta2, one.bread2
    iterations = 2
    warns = []
    if steps == "iterated":
        while iterations < MAX_ITERATIONS:
            S_next, _ = prob.unit_moments_at(beta)
            W_next, rank_next = sym_pinv(S_next)
            beta_next, bread_next = efficient_gmm(prob.zx, prob.zy, W_next)
            iterations += 1
            beta_prev, S_w, weight, rank_w = beta, S_next, W_next, rank_next
            moved = np.max(np.abs(beta_next - beta) / (1.0 + np.abs(beta)))
            beta, bread = beta_next, bread_next
            if moved < ITERATION_TOL:
                break
        else:
            warns.append(f"iterated GMM did not converge in {MAX_ITERATIONS} steps")
    ze = prob.zy - prob.zx @ beta
    hansen = _chi2(float(ze @ weight @ ze), rank_w - K)
    return _Solution(beta, beta_prev, weight, S_w, bread, rank_w, iterations, hansen, warns)


def _difference_hansen(prob: GMMProblem, sol: _Solution, one: _OneStep | None = None) -> dict:
    """difference-in-Hansen (Eichenbaum, Hansen & Singleton 1988; Hayashi 2000, §3.6):
    C = J(all) − J(without the group), both efficient with blocks of the same S."""
    d = prob.design
    L, K = prob.L, prob.K
    S_w = sol.S_w
    out = {}
    if one is not None and S_w is one.S and one.beta2 is not None:
        # S of the one-step residuals: its inverse and efficient estimate exist already
        # (the same computations, so the same numbers)
        j_full_w, b_full = one.W, one.beta2
    else:
        j_full_w, _ = sym_pinv(S_w)
        b_full, _ = efficient_gmm(prob.zx, prob.zy, j_full_w)
    j_full = hansen_statistic(prob.zx, prob.zy, j_full_w, b_full)
    for group, pos in d.instrument_groups().items():
        keep = np.setdiff1d(np.arange(L), pos)
        if len(keep) < K or len(pos) == 0:
            continue
        w_sub, rank_sub = sym_pinv(S_w[np.ix_(keep, keep)])
        if rank_sub < K:
            continue
        b_sub, _ = efficient_gmm(prob.zx[keep], prob.zy[keep], w_sub)
        j_sub = hansen_statistic(prob.zx[keep], prob.zy[keep], w_sub, b_sub)
        df = sol.rank_w - rank_sub
        if df <= 0:
            continue
        out[group] = _chi2(j_full - j_sub, df)
    return out


def _assemble(spec: Spec, prob: GMMProblem, one: _OneStep, sol: _Solution,
              diff_hansen: dict) -> FitResult:
    d = prob.design
    L, K = prob.L, prob.K
    steps = spec.steps
    warns = list(prob.warnings) + list(one.warnings) + list(sol.warnings)
    if sol.rank_w < L:
        warns.append(
            f"the robust weight matrix is singular (rank {sol.rank_w} of {L} instruments; "
            f"{d.unit_has_rows.sum()} units); a pseudo-inverse was used and the Hansen test is weak")
    T, ar = sol.task.T, sol.task.ar.acc
    weight, bread = sol.weight, sol.bread
    influence = bread @ prob.zx.T @ weight
    windmeijer_d = None
    v1_robust = one.v_robust
    if steps == 1:
        v_robust = v1_robust
        v_conv = one.sigma2 * one.bread
        kind = "cluster-robust" if spec.errors == "robust" else "conventional"
    else:
        v2 = bread
        windmeijer_d = v2 @ (prob.zx.T @ weight) @ T
        if steps == 2:
            dv = windmeijer_d @ v2
            v_robust = v2 + dv + dv.T + windmeijer_d @ v1_robust @ windmeijer_d.T
            kind = "windmeijer"
        else:
            # fixed point b = f(b): b - β ≈ (I - D)⁻¹ M Z'u (Windmeijer's expansion
            # applied at the limit of the iteration)
            inv = np.linalg.inv(np.eye(K) - windmeijer_d)
            v_robust = inv @ v2 @ inv.T
            kind = "windmeijer-iterated"
        v_conv = v2
        if spec.errors != "robust":
            kind = "conventional"
    vcov = v_robust if spec.errors == "robust" else v_conv
    vcov = 0.5 * (vcov + vcov.T)
    ar1 = _ar_test(ar[1], influence, v_robust)
    ar2 = _ar_test(ar[2], influence, v_robust)

    beta = sol.beta
    se = np.sqrt(np.clip(np.diag(vcov), 0, None))
    terms = []
    for label, b, s in zip(d.x_labels, beta, se):
        z = b / s if s > 0 else math.nan
        terms.append(TermEstimate(label, float(b), float(s), float(z), _p_normal(z)))
    units = int(d.unit_has_rows.sum())
    counts = Counts(
        observations=d.n_rows[1] if d.system else d.n_rows[0],
        units=units,
        instruments=L,
        periods=int(d.sample_mask.any(axis=0).sum()),
        transformed_rows=d.n_rows[0],
        level_rows=d.n_rows[1],
        parameters=K,
    )
    if L > units:
        warns.append(f"{L} instruments outnumber the {units} units (common practice: keep "
                     "instruments at or below the number of units)")
    settings = dict(settings_of(spec))
    settings["iterations"] = sol.iterations
    return FitResult(
        terms=tuple(terms),
        std_error_kind=kind,
        tests={"ar1": ar1, "ar2": ar2, "sargan": one.sargan, "hansen": sol.hansen},
        difference_hansen=diff_hansen,
        counts=counts,
        warnings=tuple(dict.fromkeys(warns)),
        vcov=vcov,
        settings=settings,
        diagnostics={"windmeijer_d": windmeijer_d, "beta_one_step": one.beta,
                     "vcov_one_step_robust": v1_robust, "sigma2": one.sigma2},
    )


def share_key(spec: Spec) -> str:
    """Specs with equal keys can share their work in :func:`fit_family`: they differ
    at most in ``steps``, ``errors`` and ``last_lag``. (Display fields such as the
    focus, thresholds or the sample's name do not enter the key.)"""
    key = {k: v for k, v in canonical_settings(spec).items()
           if k not in ("steps", "errors", "last_lag")}
    return json.dumps(key, sort_keys=True, separators=(",", ":"), default=str)


def _fit_specs(specs, panel, chunk_units=None, memory_mb=None, engine=None) -> list:
    """Fit specs of one share group; a failing member gives its exception."""
    out: list = [None] * len(specs)
    if engine is None:
        lags = {s.last_lag for s in specs}
        wide = specs[0] if len(lags) == 1 else dataclasses.replace(specs[0], last_lag=None)
        try:
            engine = MomentEngine(Design(wide, panel), chunk_units, memory_mb)
        except EstimationError as exc:
            return [exc] * len(specs)
    # one problem per instrument set (last_lag); the engine's own design is reused
    problems: dict = {}
    for i, spec in enumerate(specs):
        key = spec.last_lag
        if key in problems:
            continue
        try:
            design = engine.design if spec.last_lag == engine.design.spec.last_lag else None
            try:
                problems[key] = GMMProblem(spec, panel, engine=engine, design=design)
            except _NotSubset:  # not expected for last_lag families; fit it on its own
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
    for eng, keys in by_engine.values():
        tasks = {k: _SumS(live[k], ones[k].beta) for k in keys}
        eng.run_pass(list(tasks.values()))
        for k, task in tasks.items():
            ones[k].S, ones[k].ssr = task.S, task.ssr
    for k, p in live.items():
        need2 = any(s.steps != 1 for s in specs if s.last_lag == k)
        _weight_stage(p, ones[k], need2)
    # final estimates per (instrument set, steps); iterated ones run their own passes
    sols: dict = {}
    for spec in specs:
        k = spec.last_lag
        if k in live and (k, spec.steps) not in sols:
            sols[(k, spec.steps)] = _solution_stage(live[k], ones[k], spec.steps)
    final_tasks: dict = {}
    for (k, steps), sol in sols.items():
        sol.task = _FinalSums(live[k], sol.beta, sol.beta_prev, sol.weight, steps != 1)
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
            by_s[s_key] = _difference_hansen(live[key[0]], sol, ones[key[0]])
        diffs[key] = dict(by_s[s_key])
    for i, spec in enumerate(specs):
        k = spec.last_lag
        if not isinstance(problems[k], GMMProblem):
            out[i] = problems[k]
            continue
        try:
            out[i] = _assemble(spec, live[k], ones[k], sols[(k, spec.steps)],
                               diffs[(k, spec.steps)])
        except Exception as exc:  # noqa: BLE001
            out[i] = exc
    return out


def fit(spec: Spec, panel: Panel, *, chunk_units: int | None = None,
        memory_mb: float | None = None) -> FitResult:
    """Estimate one model (difference or system GMM) on a panel.

    ``chunk_units``: units per chunk (default: from the memory budget);
    ``memory_mb``: the memory budget (default :func:`memory_budget`).
    """
    with _warnings.catch_warnings():
        _warnings.simplefilter("ignore", RuntimeWarning)
        res = _fit_specs([spec], panel, chunk_units, memory_mb)[0]
    if isinstance(res, BaseException):
        raise res
    return res


def fit_family(specs, panel: Panel, *, chunk_units: int | None = None,
               memory_mb: float | None = None) -> list:
    """Fit several specs on one panel, sharing work; returns, in order, a
    :class:`FitResult` or the exception that spec raised (never raises for one spec).

    Specs are grouped by :func:`share_key`; within a group (specs differing only in
    steps, errors and last_lag) the moments are summed once for the widest
    instrument set, the one-step estimate and robust weight of each instrument set
    are computed once, and the passes over the data of all members run together.
    Results equal those of :func:`fit` on each spec: exactly for specs differing in
    steps and errors, to rounding (sums of the same terms, ordered differently) for
    specs differing in last_lag.
    """
    specs = list(specs)
    out: list = [None] * len(specs)
    groups: dict = {}
    for i, s in enumerate(specs):
        groups.setdefault(share_key(s), []).append(i)
    with _warnings.catch_warnings():
        _warnings.simplefilter("ignore", RuntimeWarning)
        for idx in groups.values():
            members = [specs[i] for i in idx]
            try:
                results = _fit_specs(members, panel, chunk_units, memory_mb)
            except Exception as exc:  # noqa: BLE001 — e.g. a memory error: fall back per spec
                results = []
                for s in members:
                    try:
                        results.append(_fit_specs([s], panel, chunk_units, memory_mb)[0])
                    except Exception as inner:  # noqa: BLE001
                        results.append(inner)
            for i, r in zip(idx, results):
                out[i] = r
    return out
