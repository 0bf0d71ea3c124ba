"""The moment problem of one model: which columns are identified, the moment sums,
and the GMM estimators built on them.

Notation (sums over units ``i``; ``Z_i`` instruments, ``X_i`` regressors, ``y_i``
outcome, stacked over the transformed and, in system GMM, the level equation):

* one-step (Arellano & Bond 1991, eq. (4)–(5)): ``A = (Σ Z_i' H Z_i)⁻¹``,
  ``b₁ = (X'Z A Z'X)⁻¹ X'Z A Z'y``;
* two-step (Hansen 1982; Arellano & Bond 1991): ``S = Σ Z_i' e₁ᵢ e₁ᵢ' Z_i`` from the
  one-step residuals, ``W = S⁻¹``, ``b₂ = (X'Z W Z'X)⁻¹ X'Z W Z'y``.

Identification (:meth:`GMMProblem._first_pass`), in this order:

1. regressor columns collinear in ``X'X`` (after the transform): period dummies
   collinear among themselves are dropped (the base period); regressors collinear
   with each other, or with the constant and period effects (a regressor that
   varies only over time, ``z = 2x + 1``), are an error naming them;
2. instrument columns that are zero for every unit, or that belong to a dropped
   dummy, are left out; so are time-effect moments implied by the time-effect
   moments before them (:meth:`.design.Design.time_functionals`; level moments
   first), whose count is reported;
3. the order condition ``L ≥ K`` and then the rank condition ``rank(Z'X) = K``
   (Hansen 1982; Hayashi 2000, section 3.2), decided on the rescaled ``Z'X``
   (:func:`.linalg.identified_columns`): a period dummy that no instrument moves is
   dropped with a warning naming it; any other such term raises
   :class:`RankConditionError` (an :class:`UnderidentifiedError`) naming it.

Every decision is taken on matrices rescaled to unit column scale, so the units of
the data never change which columns are kept.
"""
from __future__ import annotations

import itertools

import numpy as np

from ..data import Panel
from ..errors import EstimationError, RankConditionError, UnderidentifiedError
from ..spec import Spec, is_deterministic_label
from .design import Design
from .engine import MomentEngine
from .linalg import identified_columns, independent_columns, inverse_or_pinv, sym_pinv
from .moments import ARSums, moment_plan, windmeijer_term

_SERIALS = itertools.count()  # one number per problem, never reused (unlike id())


class NotSubset(Exception):
    """A member's instrument columns are not all in the engine's design."""


def _column_map(member: Design, engine: Design) -> np.ndarray:
    if member is engine:
        return np.arange(member.L_all)
    where = {(c.group, c.equation, c.description): j for j, c in enumerate(engine.z_columns)}
    try:
        return np.asarray([where[(c.group, c.equation, c.description)]
                           for c in member.z_columns], dtype=np.int64)
    except KeyError:
        raise NotSubset() from None


def efficient_gmm(zx, zy, weight):
    """``b = (X'Z W Z'X)⁻¹ X'Z W Z'y`` and ``(X'Z W Z'X)⁻¹``."""
    xzw = zx.T @ weight
    bread = xzw @ zx
    bread_inv = inverse_or_pinv(bread)
    return bread_inv @ (xzw @ zy), bread_inv


class SumS:
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


class FinalSums:
    """Task: the Windmeijer terms ``T(v)`` for each vector ``v`` of ``vectors``
    (:func:`.moments.windmeijer_term`, at ``beta_prev``) and the AR(m) sums at
    ``beta``."""

    def __init__(self, prob, beta, beta_prev, vectors=()):
        self.prob, self.beta, self.beta_prev = prob, beta, beta_prev
        self.vectors = [(v, prob.spread(v)) for v in vectors]
        self.T = [np.zeros((prob.L, prob.K)) for _ in self.vectors]
        self.ar = ARSums(prob.L, prob.K)

    def __call__(self, ctx):
        prob = self.prob
        gt = ctx.gt(prob, self.beta)
        if self.vectors:
            gtp = ctx.gt(prob, self.beta_prev)
            for acc, (v, v_all) in zip(self.T, self.vectors):
                acc += windmeijer_term(ctx.pc, ctx.layout, gtp, v, v_all,
                                       prob.scatter, prob.keep_x, ctx.scratch())
        # AR(m): differenced level residuals (Arellano & Bond 1991, eq. (8))
        self.ar.add(ctx.pc, prob.beta_all(self.beta), prob.keep_x, gt, ctx.level_differences())


def _and(items) -> str:
    items = list(items)
    return items[0] if len(items) == 1 else ", ".join(items[:-1]) + " and " + items[-1]


def _scale(diag: np.ndarray) -> np.ndarray:
    return 1.0 / np.sqrt(np.where(diag > 0, diag, 1.0))


class GMMProblem:
    """The moment sums of one model and the estimators built on them.

    ``engine``: a :class:`MomentEngine` to share (its design must contain every
    instrument column of this model); by default the problem has its own.
    """

    def __init__(self, spec: Spec, panel: Panel, chunk_units: int | None = None, *,
                 engine: MomentEngine | None = None, memory_mb: float | None = None,
                 design: Design | None = None):
        self.spec = spec
        self.serial = next(_SERIALS)  # this problem's key in its engine's kept arrays
        self.design = design if design is not None else Design(spec, panel)
        if engine is None:
            engine = MomentEngine(self.design, chunk_units, memory_mb)
        self.engine = engine
        self.source = engine.source
        self._cmap = _column_map(self.design, engine.design)
        self.warnings: list[str] = []
        self.redundant_time_moments = 0
        self._first_pass()

    # ---------------------------------------------------------------- passes
    def _first_pass(self):
        d = self.design
        zx, zy, zhz, xx = self.engine.first()
        K = len(d.x_labels_all)
        keep_x = self.engine.keep_x()
        kept = set(keep_x.tolist())
        dropped = [d.x_labels_all[j] for j in range(K) if j not in kept]
        bad = [lab for lab in dropped if not is_deterministic_label(lab)]
        # a time-invariant term vanishes under the transform: difference GMM drops it
        # with a note (its effect is absorbed by the unit effect); anything else
        # collinear is an error
        invariant = [lab for lab in bad if lab in d.time_invariant]
        if invariant and not d.system:
            self.warnings.append(
                f"{', '.join(invariant)} dropped: {'it does' if len(invariant) == 1 else 'they do'}"
                " not vary within units, so the transform removes "
                f"{'it' if len(invariant) == 1 else 'them'} (absorbed by the unit effect); "
                "difference GMM cannot estimate time-invariant terms (system GMM estimates "
                "them from the level equation)")
            bad = [lab for lab in bad if lab not in invariant]
        if bad:
            raise EstimationError(
                "regressor(s) with no independent variation after the transform: "
                f"{', '.join(bad)} (constant within every unit, or collinear with other regressors)")
        # the time effects lose columns among themselves (the base period, periods
        # outside the sample); a further deterministic column dropped is taken by the
        # regressors: some combination of them equals a combination of the constant
        # and the period effects in every row, so their coefficients are not
        # identified (dropping the constant would silently reparametrise: with
        # z = 2x + 1, "z" would become the constant)
        det = np.asarray([j for j in range(K) if is_deterministic_label(d.x_labels_all[j])], dtype=int)
        if det.size:
            alone = self.engine.independent_among(det)
            if set(alone.tolist()) - kept:
                involved = self._collinear_with_deterministic(alone)
                raise EstimationError(
                    f"{_and(involved)} {'is an exact linear function' if len(involved) == 1 else 'are exact linear functions of each other and'} "
                    "of the constant and period effects in every row of this sample, so "
                    f"{'its coefficient is' if len(involved) == 1 else 'their coefficients are'} "
                    "not identified: drop "
                    + ("it or the time effects" if len(involved) == 1 else "one of them"))
        d.set_kept_columns(keep_x)
        self._keep_instruments(zhz)
        if d.system and any(d.x_labels_all[j] in d.time_invariant for j in keep_x):
            names = [d.x_labels_all[j] for j in keep_x if d.x_labels_all[j] in d.time_invariant]
            self.warnings.append(
                f"{', '.join(names)}: time-invariant, identified from the level equation only "
                "(an exogenous one instruments itself there, which assumes it is uncorrelated "
                "with the unit effect)")
        if d.n_rows[0] <= len(keep_x):
            raise UnderidentifiedError(
                f"only {d.n_rows[0]} observations in the transformed equation for {len(keep_x)} "
                "parameters: too few observations for this model")
        if len(d.keep_z) < len(keep_x):
            raise UnderidentifiedError(
                f"fewer instruments ({len(d.keep_z)}) than parameters ({len(keep_x)}): "
                "the model is not identified")
        # the rank condition, on the rescaled Z'X
        cols = self._cmap[d.keep_z]
        ok = identified_columns(zx[np.ix_(cols, keep_x)], _scale(np.diag(zhz)[cols]),
                                _scale(np.diag(xx)[keep_x]))
        if not ok.all():
            labels = [d.x_labels_all[j] for j in keep_x[~ok]]
            terms = [lab for lab in labels if not is_deterministic_label(lab)]
            if terms:
                raise RankConditionError(
                    f"{', '.join(terms)} {'is' if len(terms) == 1 else 'are'} not identified by "
                    "the instruments of this variant (rank of Z'X below the number of parameters)")
            self.warnings.append(
                f"{', '.join(labels)} dropped: no instrument of this variant moves "
                f"{'it' if len(labels) == 1 else 'them'} (not identified)")
            keep_x = keep_x[ok]
            d.set_kept_columns(keep_x)
            self._keep_instruments(zhz)
        kz, kx = d.keep_z, d.keep_x
        cols = self._cmap[kz]  # kept instruments, as engine columns
        self.engine_cols = cols
        self.keep_x = np.asarray(kx, dtype=np.int64)
        self.zx = zx[np.ix_(cols, kx)]
        self.zy = zy[cols]
        self.zhz = zhz[np.ix_(cols, cols)]
        self.L, self.K = len(kz), len(kx)
        self.K_all = K
        # the fixed instrument scale of every weight-matrix inverse: it does not
        # depend on the coefficients, so the two-step map stays differentiable when
        # the weight is singular (see .covariance), and it removes the units
        self.z_scale = _scale(np.diag(self.zhz))
        self.scatter = self.engine.layout.scatter_rows(cols)
        self.moment_plan = moment_plan(self.scatter, self.engine.layout)
        n_rows = d.n_rows[0] + d.n_rows[1]
        if self.L >= n_rows:
            raise EstimationError(
                f"{self.L} instruments for only {n_rows} observations: reduce last_lag, "
                "use collapsed instruments or add data")

    def _collinear_with_deterministic(self, det: np.ndarray) -> list[str]:
        """The regressor terms in the span of the other regressors and the
        independent deterministic columns ``det`` (each scanned last on ``X'X``)."""
        d = self.design
        regs = [j for j in range(len(d.x_labels_all)) if not is_deterministic_label(d.x_labels_all[j])]
        involved = []
        for j in regs:
            order = np.asarray([*(r for r in regs if r != j), *det.tolist(), j], dtype=int)
            if j not in set(self.engine.independent_among(order).tolist()):
                involved.append(d.x_labels_all[j])
        return involved or [d.x_labels_all[j] for j in regs]

    def _keep_instruments(self, zhz):
        """Drop instrument columns that are zero for every unit, then redundant
        time-effect moments (see the module docstring)."""
        d = self.design
        nonzero = np.diag(zhz)[self._cmap] > 0
        keep = [j for j in d.keep_z if nonzero[j]]
        tcols = self.engine.time_cols
        if len(tcols):
            engine_of = {int(self._cmap[j]): j for j in keep}
            pos = [p for p, c in enumerate(tcols) if int(c) in engine_of]
            gram = self.engine.time_gram()[np.ix_(pos, pos)]
            independent = set(independent_columns(gram).tolist()) if pos else set()
            redundant = {engine_of[int(tcols[p])] for i, p in enumerate(pos) if i not in independent}
            keep = [j for j in keep if j not in redundant]
            self.redundant_time_moments = len(redundant)
        d.keep_z = np.asarray(keep, dtype=int)

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
        task = SumS(self, beta)
        self.engine.run_pass([task])
        return task.S, task.ssr

    def weight_from(self, S, cols: np.ndarray | None = None):
        """``W = S⁻¹`` (a generalised inverse with the fixed instrument scale when
        ``S`` is singular) and the rank of ``S``; ``cols``: the instrument positions
        ``S`` is the block of (all by default)."""
        return sym_pinv(S, scale=self.z_scale if cols is None else self.z_scale[cols])

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
        W, rank = self.weight_from(S)
        beta, bread_inv = efficient_gmm(self.zx, self.zy, W)
        return beta, W, S, bread_inv, rank

    def final_pass(self, beta, beta_prev, weight, need_windmeijer):
        """Windmeijer term and Arellano–Bond AR(m) sums at the final estimate.

        Windmeijer (2005): with ``a = W Z'e`` (final residuals) and per-unit
        ``g_i = Z_i' e_i(b_prev)``, ``q_ik = Z_i' x_ik``, the derivative of ``S`` along
        ``b_k`` applied to ``a`` is ``Σ_i q_ik (g_i'a) + g_i (q_ik'a)``; summed block by
        block (:func:`.moments.windmeijer_term`; no n×L×K or L×L×K array).
        """
        a = weight @ (self.zy - self.zx @ beta)
        task = FinalSums(self, beta, beta_prev, [a] if need_windmeijer else [])
        self.engine.run_pass([task])
        return (task.T[0] if need_windmeijer else np.zeros((self.L, self.K))), task.ar.acc
