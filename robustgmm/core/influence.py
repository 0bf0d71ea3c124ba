"""Dropping units: the influence of each unit on the estimate and exact refits of a
model without a set of units (Broderick, Giordano & Meager 2020; by units, the
independent draws of a dynamic panel).

Every sum of the estimator is a sum over units (:mod:`.moments`), so a model
refitted without the set ``D`` of units uses the sums minus the units' own
contributions. With unit weights ``w_i`` (1 kept, 0 dropped), ``Q = Σ w_i Z_i'X_i``,
``q = Σ w_i Z_i'y_i``, ``M = Σ w_i Z_i'HZ_i``, ``g_i(b) = Z_i'y_i − Z_i'X_i b``:

* one-step: ``A = M⁻¹``, ``b₁ = B₁ Q'A q``, ``B₁ = (Q'AQ)⁻¹`` (Arellano & Bond 1991);
* two-step: ``S = Σ w_i g_i(b₁) g_i(b₁)'``, ``W = S⁻¹``, ``b₂ = B₂ Q'W q``,
  ``B₂ = (Q'WQ)⁻¹``; iterated: the two-step map repeated (Hansen, Heaton & Yaron 1996).

**Influence** (the first-order change of the estimate as ``w_i`` moves from 1;
dropping unit ``i`` changes the estimate by about minus this derivative, the
"infinitesimal jackknife" of Broderick, Giordano & Meager 2020, section 2). From the
first-order conditions ``Q'A(q − Qb₁) = 0`` and ``Q'W(q − Qb₂) = 0``, with
``u = q − Qb``, ``a₁ = A u₁``, ``a₂ = W u₂`` and ``dA = −A Z_i'HZ_i A``,
``dW = −W dS W`` (our derivation):

* ``∂b₁/∂w_i = B₁ [X_i'Z_i a₁ − (AQ)' Z_i'HZ_i a₁ + (AQ)' g_i(b₁)]``;
* ``∂b₂/∂w_i = B₂ [X_i'Z_i a₂ − (WQ)' g_i(b₁) (g_i(b₁)'a₂) + (WQ)' g_i(b₂)] + D ∂b₁/∂w_i``,
  where ``D = B₂ Q'W T(a₂)`` is Windmeijer's (2005) derivative of the two-step map
  (:func:`.covariance.windmeijer_d`): the weight's dependence on ``b₁``;
* iterated, at the fixed point ``b = f(b)``: ``(I − D)⁻¹`` times the bracket of the
  two-step line with ``b₁ = b₂ = b``.

With a singular ``S`` (more instruments than units) the generalised inverse is used
in these formulas as if it were the inverse, so the two-step influence is then an
approximation of the derivative (the refits stay exact). The t-statistic's
influence is ``(∂b/∂w_i)/se``: the standard error is held at its value (first
order in the estimate only); the search (:mod:`.dropping`) decides with exact refits,
which do move the standard error.

Cost: one pass over the chunks for the per-unit ``Z_i'y_i``, ``Z_i'X_i`` (``O(n·W·K)``,
the kernel of :func:`.moments.unit_moments_t`) and one for the bilinear forms
``p'Z_i'HZ_i q`` of the influence (``O(n·W·K)``); memory ``N·L·K`` numbers.

**Exact refit** (:meth:`UnitSums.refit`) without ``D``: ``Z_i'HZ_i`` of each dropped
unit (a one-unit chunk, :func:`.moments.first_moments`) is subtracted from ``M``,
its stored ``Z_i'X_i``, ``Z_i'y_i`` from ``Q``, ``q``; the one-step estimate then
costs ``O(|D|·W_i² + L³ + L²K)`` whatever N. ``S`` at the new one-step estimate (for
the robust variance and the two-step weight) and Windmeijer's ``T`` are summed from
the stored per-unit arrays of the kept units, ``O(N·L·(K + L))`` per evaluation (no
pass over the data). The estimators and variances are those of the fit itself
(:func:`.family._solution_stage`, :mod:`.covariance`), so a refit equals a fit of
the panel without ``D`` when the reduced panel keeps the same instrument and
regressor columns (the test checks this to 1e-10).
"""
from __future__ import annotations

import math
from dataclasses import dataclass
from types import SimpleNamespace

import numpy as np

from ..options import Errors, Steps, parse
from . import covariance, diagnostics
from .linalg import sym_pinv
from .moments import first_moments, prepare, unit_moments_t
from .problem import GMMProblem, _scale, efficient_gmm


class _UnitArrays:
    """Pass task: per-unit ``Z_i'y_i`` (n, L), ``Z_i'X_i`` (n, L, K) and the
    transformed-row sums of ``y²``, ``x y``, ``x x'`` and rows (for σ²)."""

    def __init__(self, prob: GMMProblem):
        self.prob = prob
        self.parts: list = []

    def __call__(self, ctx):
        prob, pc, lay = self.prob, ctx.pc, ctx.layout
        buf = ctx.scratch()
        rows_y = np.concatenate([y.T for y in pc.y])
        zy = unit_moments_t(pc, lay, rows_y, prob.scatter, buf).T
        zx = np.empty((pc.n, prob.L, prob.K))
        for j, col in enumerate(prob.keep_x):
            rows_x = np.concatenate([x[:, :, col].T for x in pc.x])
            zx[:, :, j] = unit_moments_t(pc, lay, rows_x, prob.scatter, buf).T
        yt, xt = pc.y[0], pc.x[0][:, :, prob.keep_x]
        self.parts.append((zy, zx, (yt * yt).sum(axis=1), np.einsum("npk,np->nk", xt, yt),
                           np.einsum("npk,npj->nkj", xt, xt), pc.rows[0].sum(axis=1)))


class _HForms:
    """Pass task: per-unit bilinear forms ``p_j' Z_i'HZ_i q_j`` for the columns of
    ``P`` and ``Qv`` (L, m): the per-row values ``Z_i p`` of each block, then ``H``
    (the diagonal weights of the blocks and the first-difference neighbours), as in
    :func:`.moments.first_moments`."""

    def __init__(self, prob: GMMProblem, P: np.ndarray, Qv: np.ndarray):
        L_all = prob.engine.layout.L
        self.P = np.zeros((L_all, P.shape[1]))
        self.P[prob.engine_cols] = P
        self.Q = np.zeros((L_all, Qv.shape[1]))
        self.Q[prob.engine_cols] = Qv
        self.parts: list = []

    def __call__(self, ctx):
        pc, lay = ctx.pc, ctx.layout
        nb, m = len(lay.block_slot), self.P.shape[1]
        hp = np.empty((nb, m, pc.n))
        hq = np.empty((nb, m, pc.n))
        for j in range(nb):
            lo, hi = lay.starts[j], lay.stops[j]
            cols = lay.ent_col[lo:hi]
            hp[j] = self.P[cols].T @ pc.ZT[lo:hi]
            hq[j] = self.Q[cols].T @ pc.ZT[lo:hi]
        out = np.einsum("b,bmn,bmn->nm", lay.block_diag, hp, hq)
        for j, k, _, _ in lay.pairs:
            out -= (hp[j] * hq[k] + hp[k] * hq[j]).T
        self.parts.append(out)


@dataclass(frozen=True)
class Refit:
    """An exact refit without some units: coefficients, variance, the t-statistics
    and normal p-values of every term (the fit's own variance estimator)."""

    beta: np.ndarray
    vcov: np.ndarray
    std_error: np.ndarray
    z: np.ndarray
    p_value: np.ndarray
    beta_one_step: np.ndarray
    warnings: tuple = ()


class UnitSums:
    """The per-unit contributions of one model's moment problem, for influence and
    exact refits without units (module docstring).

    ``units``: positions on the panel; ``active``: units with at least one row.
    """

    def __init__(self, prob: GMMProblem, spec=None):
        self.prob = prob
        spec = prob.spec if spec is None else spec
        self.steps = parse(Steps, spec.steps)
        self.errors = parse(Errors, spec.errors)
        task = _UnitArrays(prob)
        prob.engine.run_pass([task])
        cat = [np.concatenate([p[j] for p in task.parts]) for j in range(6)]
        self.zy, self.zx, self.yy, self.xy, self.xx, self.n_t = cat
        self.N, self.L, self.K = self.zx.shape
        self.active = prob.design.unit_has_rows.copy()
        self.rows = (prob.design.sample_mask.sum(axis=1) if hasattr(prob.design, "sample_mask")
                     else None)
        self.labels = list(prob.design.x_labels)
        self.fod = prob.design.fod
        self._zhz: dict[int, np.ndarray] = {}

    # ----------------------------------------------------------- unit sums
    def unit_zhz(self, i: int) -> np.ndarray:
        """``Z_i'HZ_i`` of unit ``i`` on the kept instrument columns (one-unit chunk)."""
        out = self._zhz.get(i)
        if out is None:
            eng = self.prob.engine
            pc = prepare(eng.design.chunk(i, i + 1), eng.layout)
            zhz = first_moments(pc, eng.layout)[2]
            cols = self.prob.engine_cols
            out = self._zhz[i] = zhz[np.ix_(cols, cols)]
        return out

    def _sums(self, dropped: np.ndarray, weights: np.ndarray | None = None):
        """``M, Q, q`` with the units ``dropped`` removed (or down-weighted to
        ``weights``, for the finite-difference checks)."""
        prob = self.prob
        lost = np.ones(len(dropped)) if weights is None else 1.0 - np.asarray(weights, float)
        M = prob.zhz.copy()
        for i, c in zip(dropped, lost):
            M -= c * self.unit_zhz(int(i))
        Q = prob.zx - np.einsum("n,nlk->lk", lost, self.zx[dropped])
        q = prob.zy - lost @ self.zy[dropped]
        return M, Q, q

    def _weights(self, dropped, weights=None):
        w = self.active.astype(float)
        w[dropped] = 0.0 if weights is None else np.asarray(weights, float)
        return w

    # ----------------------------------------------------------- refits
    def _reduced(self, dropped, weights=None):
        """A problem-like object of the model without ``dropped`` (what
        :func:`.family._solution_stage` and :mod:`.covariance` read)."""
        M, Q, q = self._sums(dropped, weights)
        w = self._weights(dropped, weights)
        zy, zx = self.zy, self.zx
        sel = np.flatnonzero(w)
        zs = _scale(np.diag(M))

        def moments_at(beta):
            g = zy[sel] - zx[sel] @ beta
            ssr = float(w[sel] @ (self.yy[sel] - 2 * self.xy[sel] @ beta
                                   + np.einsum("nkj,k,j->n", self.xx[sel], beta, beta)))
            return (g * w[sel, None]).T @ g, ssr

        red = SimpleNamespace(zx=Q, zy=q, zhz=M, L=self.L, K=self.K, z_scale=zs,
                              unit_moments_at=lambda b: moments_at(b),
                              weight_from=lambda S, cols=None: sym_pinv(S, scale=zs),
                              n_t=float(w @ self.n_t), w=w, sel=sel, warnings=[])
        red.moments_at = moments_at
        return red

    def _windmeijer_terms(self, red, beta_prev, vectors):
        """``T(v) = Σ_i w_i [Z_i'X_i (g_i'v) + g_i (v'Z_i'X_i)]`` at ``beta_prev``."""
        sel, w = red.sel, red.w[red.sel]
        zx = self.zx[sel]
        g = (self.zy[sel] - zx @ beta_prev) * w[:, None]
        out = []
        for v in vectors:
            out.append(np.einsum("nlk,n->lk", zx, g @ v) + g.T @ np.einsum("nlk,l->nk", zx, v))
        return out

    def _solve(self, red):
        """One-step stage, solution and variance of the fit's estimator on ``red``."""
        from .family import _OneStep, _solution_stage
        A, rank_a = sym_pinv(red.zhz)
        beta1, bread1 = efficient_gmm(red.zx, red.zy, A)
        one = _OneStep(beta1, A, bread1, rank_a, [])
        one.S, one.ssr = red.moments_at(beta1)
        one.W, one.rank_s = red.weight_from(one.S)
        m1 = bread1 @ red.zx.T @ A
        one.v_robust = m1 @ one.S @ m1.T
        df = red.n_t - self.K
        one.sigma2 = one.ssr / (df * (1.0 if self.fod else 2.0)) if df > 0 else math.nan
        one.beta2, one.bread2 = efficient_gmm(red.zx, red.zy, one.W)
        sol = _solution_stage(red, one, self.steps)
        if covariance.needs_windmeijer(self.steps):
            vectors = covariance.windmeijer_vectors(red, sol)
            sol.task = SimpleNamespace(T=self._windmeijer_terms(red, sol.beta_prev, vectors))
        inputs = covariance.Inputs(red, one, sol)
        return one, sol, inputs

    def refit(self, dropped=(), weights=None) -> Refit:
        """The exact refit without the units at positions ``dropped`` (``weights``:
        their weights instead of 0, for derivative checks)."""
        dropped = np.asarray(dropped, dtype=np.int64)
        return self._refit_of(*self._solve(self._reduced(dropped, weights)))

    def _refit_of(self, one, sol, inputs) -> Refit:
        vcov = covariance.estimator(self.steps, self.errors)(inputs)
        vcov = 0.5 * (vcov + vcov.T)
        se = np.sqrt(np.clip(np.diag(vcov), 0, None))
        z = np.where(se > 0, sol.beta / np.where(se > 0, se, 1.0), np.nan)
        p = np.asarray([diagnostics.p_normal(v) for v in z])
        return Refit(sol.beta, vcov, se, z, p, one.beta, tuple(sol.warnings))

    # ----------------------------------------------------------- influence
    def influence(self, dropped=()) -> np.ndarray:
        """``∂b/∂w_i`` for every unit (N, K) of the model without ``dropped``
        (module docstring); zero for dropped units and units without rows."""
        return self.state(dropped)[1]

    def state(self, dropped=()) -> tuple[Refit, np.ndarray]:
        """The exact refit without ``dropped`` and the influence ``∂b/∂w_i`` (N, K) of
        every unit on it (one solve for both)."""
        dropped = np.asarray(dropped, dtype=np.int64)
        red = self._reduced(dropped)
        one, sol, inputs = self._solve(red)
        refit = self._refit_of(one, sol, inputs)
        w = red.w
        Q, q = red.zx, red.zy
        zx, zy = self.zx, self.zy
        # one-step: B₁ [X_i'Z_i a₁ − (AQ)' Z_i'HZ_i a₁ + (AQ)' g_i(b₁)]
        b1 = one.beta
        a1 = one.A @ (q - Q @ b1)
        AQ = one.A @ Q
        g1 = zy - zx @ b1
        forms = self._h_forms(AQ, np.repeat(a1[:, None], self.K, axis=1))
        d1 = (np.einsum("nlk,l->nk", zx, a1) - forms + g1 @ AQ) @ one.bread
        if self.steps == Steps.ONE:
            return refit, d1 * w[:, None]
        b2, b_prev = sol.beta, sol.beta_prev
        a2 = sol.weight @ (q - Q @ b2)
        WQ = sol.weight @ Q
        gp = zy - zx @ b_prev
        g2 = zy - zx @ b2
        direct = (np.einsum("nlk,l->nk", zx, a2) - (gp @ WQ) * (gp @ a2)[:, None]
                  + g2 @ WQ) @ sol.bread
        D = inputs.D
        if self.steps == Steps.TWO:
            out = direct + d1 @ D.T
        else:  # iterated: at the fixed point b = f(b), db = (I − D)⁻¹ (direct part)
            out = direct @ np.linalg.inv(np.eye(self.K) - D).T
        return refit, out * w[:, None]

    def _h_forms(self, P, Qv) -> np.ndarray:
        task = _HForms(self.prob, P, Qv)
        self.prob.engine.run_pass([task])
        return np.concatenate(task.parts)


def unit_sums(spec, panel, **kw) -> UnitSums:
    """The :class:`UnitSums` of ``spec`` on ``panel`` (its own moment problem)."""
    return UnitSums(GMMProblem(spec, panel, **kw), spec)
