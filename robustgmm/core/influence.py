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

Cost of the per-unit sums: one pass over the chunks, in one of two layouts
(:class:`_UnitArrays`). Each unit's instrument rows are one row per laid-out block
(``R`` blocks) with ``E`` instrument entries on the ``L`` kept columns.

* **dense**: ``Z_i'X_i`` (``N·L·K`` numbers, laid out as ``(L, N, K)``, so that
  ``v'Z_i'X_i`` is one matrix-vector product) and every unit's ``Z_i'HZ_i``
  (``N·L²``), batched products ``O(N·R·L·(K + L))``; a form ``p'Z_i'HZ_i q`` is then
  one product with the stored matrices;
* **entries**: the entries themselves (``N·E`` numbers) and the block rows of ``X``
  (``N·R·K``); every product with ``Z_i'X_i`` and every form ``p'Z_i'HZ_i q`` is a
  pass over them, ``O(N·(E + R·K))``, with no pass over the data.

The dense layout is taken when its ``8·N·L·(L + R)`` bytes (with the dense rows of
the chunks) fit in a quarter of the core's memory budget
(:func:`.engine.memory_budget`, ``ROBUSTGMM_MEMORY_MB``: half of it holds the
prepared chunks, a quarter the chunk being built) and its products are the cheaper,
``L·K ≤ 1.5·(E + R·K)`` (:data:`DENSE_FACTOR`, measured): few instruments with many
entries each (collapsed); per-period instruments (one entry each, ``L`` in the
hundreds) take the entries.

**Exact refit** (:meth:`UnitSums.refit`) without ``D``: the dropped units' stored
``Z_i'HZ_i``, ``Z_i'X_i``, ``Z_i'y_i`` are subtracted from ``M``, ``Q``, ``q``; the
one-step estimate then costs ``O(|D|·L² + L³ + L²K)`` whatever N. ``S`` at the new
one-step estimate (for the robust variance and the two-step weight) and Windmeijer's
``T`` are summed from the stored per-unit arrays with the units' weights (0 for the
dropped ones), ``O(N·L·(K + L))`` per evaluation, the residual moments ``g_i(b)``
computed once per estimate and shared by ``S``, ``T`` and the influence.

**One greedy step** (:meth:`UnitSums.state`: a refit and the influence of every unit
on it) is therefore ``O(N·L·(K + L) + L³)`` (dense) or ``O(N·(E + R·K + L²) + L³)``
(entries) with no pass over the data: the forms ``(AQ)'Z_i'HZ_i a₁`` are one
product per unit of ``Z_i'HZ_i a₁`` with ``AQ``; measured 0.16-0.17 of a fit (CPU
time) at N = 5,000 (``robustgmm bench``, workload 8). The estimators and variances
are those of the fit itself (:func:`.family._solution_stage`, :mod:`.covariance`), so a refit equals a fit of
the panel without ``D`` when the reduced panel keeps the same instrument and
regressor columns (the test checks this to 1e-10).

**Long-run effects** ``θ = g(b)`` (:mod:`.longrun`): the influence is the chain rule
``∇g(b)' ∂b/∂w_i`` (:meth:`UnitSums.term_influence`), and a refit's long-run effects
are :func:`.longrun.long_run_effects` of its ``b`` and covariance (the fit's own
formula and delta-method standard error).
"""
from __future__ import annotations

import math
from dataclasses import dataclass
from types import SimpleNamespace

import numpy as np
from scipy import sparse

from ..options import Errors, Steps, parse
from . import covariance, diagnostics, longrun
from .linalg import sym_pinv
from .problem import GMMProblem, _scale, efficient_gmm


#: The dense layout is chosen when ``L·K ≤ DENSE_FACTOR · (E + R·K)`` (and it fits
#: the memory budget): one greedy step measured (CPU time, one BLAS thread, N = 1,500
#: to 5,000) in six models, dense / entries in ms: collapsed lags 2-4 T = 10
#: 4.6 / 8.3 and collapsed all lags T = 12 6.6 / 9.2 (dense); per-period T = 6
#: 4.1 / 3.7, difference T = 7 4.4 / 3.3, lags 2-3 T = 12 19.3 / 9.5, all lags
#: T = 12 29.7 / 9.1 (entries). The rule with 1.5 picks the faster layout in all six.
DENSE_FACTOR = 1.5


def kept_entries(prob: GMMProblem) -> int:
    """``E``: the instrument entries of a unit's laid-out blocks on the kept columns."""
    return int(np.isin(prob.engine.layout.ent_col, prob.engine_cols).sum())


def dense_layout(N: int, L: int, K: int, R: int, E: int, budget: int) -> bool:
    """Whether the per-unit sums take the dense layout (module docstring): its
    ``8·N·L·(L + R)`` bytes fit a quarter of the core's memory ``budget`` and its
    products are the cheaper (:data:`DENSE_FACTOR`)."""
    return 8 * N * L * (L + R) <= budget // 4 and L * K <= DENSE_FACTOR * (E + R * K)


class _UnitArrays:
    """Pass task: per-unit ``Z_i'y_i`` (N, L), the transformed-row sums of ``y²``,
    ``x y``, ``x x'`` and rows (for σ²), and the per-unit arrays of one of two
    layouts, written chunk by chunk into arrays allocated once.

    Each unit's instrument rows are one row per laid-out block (``R`` blocks, the
    transformed ``y`` and ``X`` rows of their slots) with the block's instrument
    entries on the kept columns, as :func:`.moments.first_moments` sums them.

    * ``with_zhz`` (dense): ``Z_i`` laid out densely (R × L), and ``Z_i'y_i``,
      ``Z_i'X_i`` (stored as (L, N, K)), ``Z_i'(H Z_i)`` (N, L, L) batched products,
      ``H`` the one-step weight on the blocks (their diagonal weights, −1 between
      first-difference neighbours);
    * otherwise (entries): the instrument entries themselves (``E`` kept entries × N),
      the block rows of ``y`` (R, N) and ``X`` (R, N, K), from which every product
      with ``Z_i'X_i`` and every form ``p'Z_i'HZ_i q`` is a pass over these arrays
      (:class:`UnitSums`), ``O(N·(E + R·K))`` instead of ``O(N·L·K)``."""

    def __init__(self, prob: GMMProblem, with_zhz: bool = False, with_ssr: bool = True):
        self.prob = prob
        N, L, K = prob.design.panel.n_units, prob.L, prob.K
        self.zy = np.empty((N, L))
        self.yy, self.xy, self.xx = ((np.empty(N), np.empty((N, K)), np.empty((N, K, K)))
                                     if with_ssr else (None, None, None))
        self.n_t = np.empty(N)
        self.lo = 0
        lay = prob.engine.layout
        pos = np.full(lay.L, -1, dtype=np.int64)
        pos[prob.engine_cols] = np.arange(len(prob.engine_cols))
        ent_pos = pos[lay.ent_col]
        #: the kept entries (in block order), the block and kept column of each
        self.keep = np.flatnonzero(ent_pos >= 0)
        R = len(lay.block_slot)  # a row per laid-out block, as first_moments sums them
        self.rows = np.repeat(np.arange(R), lay.stops - lay.starts)[self.keep]
        self.cols = ent_pos[self.keep]
        self.R = R
        E = len(self.keep)
        #: sums the entries into their columns (L × E) and their blocks (R × E)
        self.col_sum = sparse.csr_matrix((np.ones(E), (self.cols, np.arange(E))), shape=(L, E))
        self.block_sum = sparse.csr_matrix((np.ones(E), (self.rows, np.arange(E))),
                                           shape=(R, E))
        #: each block's range of kept entries (they are in block order)
        self.block_bounds = np.searchsorted(self.rows, np.arange(R + 1))
        self.dense = with_zhz
        if with_zhz:
            # Z_i'X_i is stored as (L, N, K) only (UnitSums.zx is its (N, L, K) view)
            self.zxl = np.empty((L, N, K))
            self.zhz = np.empty((N, L, L))
            H = np.zeros((R, R))
            H[np.arange(R), np.arange(R)] = lay.block_diag
            for j, k, _, _ in lay.pairs:
                H[j, k] -= 1.0
                H[k, j] -= 1.0
            self.H = H
        else:
            self.zxl = self.zhz = None
            self.entries = np.empty((len(self.keep), N))
            self.x_rows = np.empty((R, N, K))

    def __call__(self, ctx):
        prob, pc, lay = self.prob, ctx.pc, ctx.layout
        lo, hi = self.lo, self.lo + pc.n  # the engine passes the chunks in unit order
        self.lo = hi
        slots = lay.block_slot  # the row slot (equation · P + period) of each block
        y = np.concatenate(pc.y, axis=1)[:, slots]
        x = np.concatenate(pc.x, axis=1)[:, slots[:, None], prob.keep_x[None, :]]
        if self.dense:
            Z = np.zeros((pc.n, self.R, prob.L))
            Z[:, self.rows, self.cols] = pc.ZT[self.keep].T
            ZT = Z.transpose(0, 2, 1)
            np.matmul(ZT, y[:, :, None], out=self.zy[lo:hi, :, None])
            np.matmul(ZT, x, out=self.zxl[:, lo:hi].transpose(1, 0, 2))
            np.matmul(ZT, np.matmul(self.H, Z), out=self.zhz[lo:hi])
        else:
            ent = pc.ZT[self.keep]
            self.entries[:, lo:hi] = ent
            self.x_rows[:, lo:hi] = x.transpose(1, 0, 2)
            # Z_i'y_i = Σ over entries e of z_e y_(block of e), summed into its column
            self.zy[lo:hi] = (self.col_sum @ (ent * y.T[self.rows])).T
        if self.yy is not None:
            yt, xt = pc.y[0], pc.x[0][:, :, prob.keep_x]
            xtt = xt.transpose(0, 2, 1)
            self.yy[lo:hi] = (yt * yt).sum(axis=1)
            np.matmul(xtt, yt[:, :, None], out=self.xy[lo:hi, :, None])
            np.matmul(xtt, xt, out=self.xx[lo:hi])
        self.n_t[lo:hi] = pc.rows[0].sum(axis=1)


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
    #: coefficient labels, in the order of ``beta``
    labels: tuple = ()
    #: the long-run effects at this refit (:func:`.longrun.long_run_effects` on its
    #: ``beta`` and ``vcov``, the fit's own formula)
    long_run: tuple = ()

    def term(self, label: str) -> tuple[float, float, float, float]:
        """``(estimate, std_error, z, p_value)`` of a coefficient or long-run effect."""
        if label in self.labels:
            k = self.labels.index(label)
            return (float(self.beta[k]), float(self.std_error[k]), float(self.z[k]),
                    float(self.p_value[k]))
        for t in self.long_run:
            if t.label == label:
                return t.estimate, t.std_error, t.z, t.p_value
        raise KeyError(label)


class UnitSums:
    """The per-unit contributions of one model's moment problem, for influence and
    exact refits without units (module docstring).

    ``units``: positions on the panel; ``active``: units with at least one row.
    """

    def __init__(self, prob: GMMProblem, spec=None, store_zhz: bool | None = None):
        self.prob = prob
        spec = prob.spec if spec is None else spec
        self.steps = parse(Steps, spec.steps)
        self.errors = parse(Errors, spec.errors)
        N, L, R = prob.design.panel.n_units, prob.L, len(prob.engine.layout.block_slot)
        if store_zhz is None:  # the module docstring's layout rule
            store_zhz = dense_layout(N, L, prob.K, R, kept_entries(prob), prob.source.budget)
        # the sum of squared residuals only feeds σ², which only the conventional
        # one-step variance reads: its per-unit sums are skipped otherwise
        with_ssr = covariance.estimator(self.steps, self.errors) is covariance.ConventionalOneStep
        task = _UnitArrays(prob, with_zhz=store_zhz, with_ssr=with_ssr)
        prob.engine.run_pass([task])
        self.zy, self.yy, self.xy, self.xx, self.n_t = (
            task.zy, task.yy, task.xy, task.xx, task.n_t)
        self.L, self.N, self.K = L, N, prob.K
        # dense: Z_i'X_i of every unit stored as (L, N, K): v'Z_i'X_i for all units is
        # then one matrix-vector product over long rows (measured about 2× faster than
        # a batched product over N small matrices), Z_i'X_i b one over (L·N, K)
        self._zxl = task.zxl
        #: every unit's Z_i'HZ_i (N, L, L) when stored (dense layout), else None
        self.zhz_units = task.zhz
        # entries: the kept instrument entries (E, N) and the block rows of X
        self._entries = None if store_zhz else task.entries
        self._x_rows = None if store_zhz else task.x_rows
        self._ent_rows, self._ent_cols = task.rows, task.cols
        self._col_sum, self._block_sum = task.col_sum, task.block_sum
        self._block_bounds = task.block_bounds
        lay = prob.engine.layout
        self._block_diag = np.asarray(lay.block_diag, dtype=float)
        self._pairs = [(j, k) for j, k, _, _ in lay.pairs]
        self.active = prob.design.unit_has_rows.copy()
        self.rows = (prob.design.sample_mask.sum(axis=1) if hasattr(prob.design, "sample_mask")
                     else None)
        self.labels = list(prob.design.x_labels)
        self.spec = spec
        #: (label, regressor term positions, AR term positions) of each long-run effect
        self.long_run_parts = longrun.parts(spec, self.labels)
        #: every term with an influence: the coefficients, then the long-run effects
        self.term_labels = self.labels + [lab for lab, _, _ in self.long_run_parts]
        self.fod = prob.design.fod
        self._zhz: dict[int, np.ndarray] = {}

    # ----------------------------------------------------------- unit sums
    @property
    def zx(self) -> np.ndarray:
        """Every unit's ``Z_i'X_i`` (N, L, K): a view of the stored (L, N, K) array
        (dense layout), or built from the entries (a new array)."""
        if self._zxl is not None:
            return self._zxl.transpose(1, 0, 2)
        vals = self._entries[:, :, None] * self._x_rows[self._ent_rows]   # (E, N, K)
        return np.asarray(self._col_sum @ vals.reshape(len(vals), -1)).reshape(
            self.L, self.N, self.K).transpose(1, 0, 2)

    def zx_times(self, b: np.ndarray) -> np.ndarray:
        """``Z_i'X_i b`` of every unit (N, L): with entries, ``Σ_e z_e (x_(block e)'b)``
        summed into each entry's column."""
        if self._zxl is not None:
            return (self._zxl.reshape(-1, self.K) @ b).reshape(self.L, self.N).T
        xb = (self._x_rows.reshape(-1, self.K) @ b).reshape(-1, self.N)    # (R, N)
        return np.asarray(self._col_sum @ (self._entries * xb[self._ent_rows])).T

    def times_zx(self, v: np.ndarray) -> np.ndarray:
        """``v'Z_i'X_i`` of every unit (N, K): with entries, ``Σ_r (Z_i v)_r x_r``
        over the blocks ``r``."""
        if self._zxl is not None:
            return (v @ self._zxl.reshape(self.L, -1)).reshape(self.N, self.K)
        zv = np.asarray(self._block_sum @ (self._entries * v[self._ent_cols, None]))  # (R, N)
        return np.einsum("rn,rnk->nk", zv, self._x_rows)

    def weighted_zx(self, c: np.ndarray, units=None) -> np.ndarray:
        """``Σ_i c_i Z_i'X_i`` (L, K) over every unit, or over the positions ``units``
        (``c`` then one weight per listed unit)."""
        if self._zxl is not None:
            zxl = self._zxl if units is None else self._zxl[:, units]
            return np.matmul(c, zxl)
        ent = self._entries if units is None else self._entries[:, units]
        x_rows = self._x_rows if units is None else self._x_rows[:, units]
        weighted = ent * c
        per_entry = np.empty((len(ent), self.K))
        bounds = self._block_bounds
        for r in range(len(bounds) - 1):
            lo, hi = bounds[r], bounds[r + 1]
            per_entry[lo:hi] = weighted[lo:hi] @ x_rows[r]
        return np.asarray(self._col_sum @ per_entry)

    def unit_zhz(self, i: int) -> np.ndarray:
        """``Z_i'HZ_i`` of unit ``i`` on the kept instrument columns."""
        if self.zhz_units is not None:
            return self.zhz_units[i]
        out = self._zhz.get(i)
        if out is None:
            Z = np.zeros((len(self._block_diag), self.L))
            Z[self._ent_rows, self._ent_cols] = self._entries[:, i]
            HZ = self._block_diag[:, None] * Z
            for j, k in self._pairs:
                HZ[j] -= Z[k]
                HZ[k] -= Z[j]
            out = self._zhz[i] = Z.T @ HZ
        return out

    def _sums(self, dropped: np.ndarray, weights: np.ndarray | None = None):
        """``M, Q, q`` with the units ``dropped`` removed (or down-weighted to
        ``weights``, for the finite-difference checks)."""
        prob = self.prob
        lost = np.ones(len(dropped)) if weights is None else 1.0 - np.asarray(weights, float)
        if self.zhz_units is not None:
            M = prob.zhz - np.einsum("n,nlj->lj", lost, self.zhz_units[dropped])
        else:
            M = prob.zhz.copy()
            for i, c in zip(dropped, lost):
                M -= c * self.unit_zhz(int(i))
        Q = prob.zx - self.weighted_zx(lost, dropped)
        q = prob.zy - lost @ self.zy[dropped]
        return M, Q, q

    def _weights(self, dropped, weights=None):
        w = self.active.astype(float)
        w[dropped] = 0.0 if weights is None else np.asarray(weights, float)
        return w

    # ----------------------------------------------------------- refits
    def _reduced(self, dropped, weights=None):
        """A problem-like object of the model without ``dropped`` (what
        :func:`.family._solution_stage` and :mod:`.covariance` read). Sums over the
        stored per-unit arrays of every unit with its weight (0 for dropped units and
        units without rows: their terms vanish), so no array is copied per step."""
        M, Q, q = self._sums(dropped, weights)
        w = self._weights(dropped, weights)
        zs = _scale(np.diag(M))
        resid: dict = {}

        def g_at(beta):
            # g_i(b) = Z_i'y_i − Z_i'X_i b for every unit, memoised per b: the one-step
            # S, Windmeijer's T and the influence read the same residual moments
            key = beta.tobytes()
            if key not in resid:
                resid[key] = self.zy - self.zx_times(beta)
            return resid[key]

        root_w = np.sqrt(w)

        def outer_sum(g):
            # Σ w_i g_i g_i' as G'G with G = √w g: the symmetric product, half the
            # multiplications of (w g)'g (the weights are never negative)
            gw = g * root_w[:, None]
            return gw.T @ gw

        def moments_at(beta):
            g = g_at(beta)
            if self.xx is None:  # not needed by this model's variance (σ² unused)
                return outer_sum(g), math.nan
            xxb = (self.xx.reshape(-1, self.K) @ beta).reshape(self.N, self.K)
            ssr = float(w @ (self.yy - 2 * self.xy @ beta + xxb @ beta))
            return outer_sum(g), ssr

        products: dict = {}

        def times_zx(v):
            # v'Z_i'X_i for every unit, memoised per v: Windmeijer's first vector is the
            # influence's a₂ = W(q − Qb₂)
            key = v.tobytes()
            if key not in products:
                products[key] = self.times_zx(v)
            return products[key]

        red = SimpleNamespace(zx=Q, zy=q, zhz=M, L=self.L, K=self.K, z_scale=zs,
                              unit_moments_at=moments_at, moments_at=moments_at, g_at=g_at,
                              times_zx=times_zx,
                              weight_from=lambda S, cols=None: sym_pinv(S, scale=zs),
                              n_t=float(w @ self.n_t), w=w, warnings=[])
        return red

    def _windmeijer_terms(self, red, beta_prev, vectors):
        """``T(v) = Σ_i w_i [Z_i'X_i (g_i'v) + g_i (v'Z_i'X_i)]`` at ``beta_prev``."""
        g = red.g_at(beta_prev) * red.w[:, None]
        out = []
        for v in vectors:
            out.append(self.weighted_zx(g @ v) + g.T @ red.times_zx(v))
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
        lr = longrun.long_run_effects(self.spec, self.labels, sol.beta, vcov)[0]
        return Refit(sol.beta, vcov, se, z, p, one.beta, tuple(sol.warnings),
                     tuple(self.labels), lr)

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
        if self.steps != Steps.ITERATED:  # the iterated influence needs no one-step part
            # one-step: B₁ [X_i'Z_i a₁ − (AQ)' Z_i'HZ_i a₁ + (AQ)' g_i(b₁)]
            b1 = one.beta
            a1 = one.A @ (q - Q @ b1)
            AQ = one.A @ Q
            forms = self._h_forms(AQ, a1)
            d1 = (self.times_zx(a1) - forms + red.g_at(b1) @ AQ) @ one.bread
            if self.steps == Steps.ONE:
                return refit, d1 * w[:, None]
        b2, b_prev = sol.beta, sol.beta_prev
        a2 = sol.weight @ (q - Q @ b2)
        WQ = sol.weight @ Q
        gp = red.g_at(b_prev)
        g2 = red.g_at(b2)
        direct = (red.times_zx(a2) - (gp @ WQ) * (gp @ a2)[:, None]
                  + g2 @ WQ) @ sol.bread
        D = inputs.D
        if self.steps == Steps.TWO:
            out = direct + d1 @ D.T
        else:  # iterated: at the fixed point b = f(b), db = (I − D)⁻¹ (direct part)
            out = direct @ np.linalg.inv(np.eye(self.K) - D).T
        return refit, out * w[:, None]

    def term_influence(self, label: str, refit: Refit, infl: np.ndarray) -> np.ndarray:
        """``∂θ/∂w_i`` (N,) of term ``label`` at a state (:meth:`state`): the column of
        a coefficient, or for a long-run effect ``θ = g(b)`` the chain rule
        ``∇g(b)' ∂b/∂w_i`` with the gradient of :func:`.longrun.gradient` at the
        state's ``b`` (NaN for every unit where the effect is not defined)."""
        if label in self.labels:
            return infl[:, self.labels.index(label)]
        for lab, idx, ar in self.long_run_parts:
            if lab == label:
                if not math.isfinite(longrun.value(refit.beta, idx, ar)):
                    return np.full(self.N, math.nan)
                return infl @ longrun.gradient(refit.beta, idx, ar)
        raise KeyError(label)

    def _h_forms(self, P, q) -> np.ndarray:
        """``p_j' Z_i'HZ_i q`` for every unit (N, m) and the columns ``p_j`` of ``P``
        (L, m), one vector ``q`` (L,): ``(Z_i'HZ_i q)' P``. With the entries,
        ``Z_i'H(Z_i q)`` is the per-block values ``Z_i q``, ``H`` applied on the blocks
        and the entries summed back into their columns."""
        if self.zhz_units is not None:
            return (self.zhz_units @ q) @ P
        ent = self._entries
        zq = np.asarray(self._block_sum @ (ent * q[self._ent_cols, None]))     # (R, N)
        hzq = self._block_diag[:, None] * zq
        for j, k in self._pairs:
            hzq[j] -= zq[k]
            hzq[k] -= zq[j]
        zhzq = np.asarray(self._col_sum @ (ent * hzq[self._ent_rows]))         # (L, N)
        return zhzq.T @ P

def unit_sums(spec, panel, store_zhz: bool | None = None, **kw) -> UnitSums:
    """The :class:`UnitSums` of ``spec`` on ``panel`` (its own moment problem;
    ``store_zhz``: keep every unit's ``Z_i'HZ_i``, by default when it fits the
    memory rule of the module docstring)."""
    return UnitSums(GMMProblem(spec, panel, **kw), spec, store_zhz)
