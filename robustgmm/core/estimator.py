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
"""
from __future__ import annotations

import math
import warnings as _warnings

import numpy as np
from scipy import stats

from ..data import Panel
from ..errors import EstimationError
from ..spec import Spec, is_deterministic_label, settings_of
from .design import TRANSFORMED, Design
from .linalg import independent_columns, solve_sym, sym_pinv
from .moments import first_moments, residuals, unit_instrument_regressor, unit_moments
from .results import Counts, FitResult, TermEstimate, TestResult

DEFAULT_CHUNK_BYTES = 192 * 2**20
DEFAULT_CACHE_BYTES = 1024 * 2**20
ITERATION_TOL = 1e-10
MAX_ITERATIONS = 200


class ChunkSource:
    """Yields the design's chunks of units; keeps them in memory when they fit.

    Memory is bounded by one chunk (plus the L×L matrices) when the panel is too
    large to keep: the chunks are then rebuilt on each pass over the data.
    """

    def __init__(self, design: Design, chunk_units: int | None = None,
                 chunk_bytes: int = DEFAULT_CHUNK_BYTES, cache_bytes: int = DEFAULT_CACHE_BYTES):
        self.design = design
        N = design.panel.n_units
        per_unit = self.bytes_per_unit(design)
        if chunk_units is None:
            chunk_units = max(1, int(chunk_bytes // per_unit))
        self.chunk_units = max(1, min(int(chunk_units), max(N, 1)))
        self.ranges = [(lo, min(lo + self.chunk_units, N)) for lo in range(0, N, self.chunk_units)]
        self.keep = per_unit * N <= cache_bytes
        self._cache: dict[int, object] = {}

    @staticmethod
    def bytes_per_unit(design: Design) -> int:
        P = design.P
        k = len(design.x_labels_all) + len(design.extra_terms)
        width = sum(len(b.cols) for b in design.blocks)
        # arrays of a chunk plus the per-unit Z'X of the Windmeijer pass
        return 8 * (P * k * 6 + width + design.L_all * (len(design.x_labels_all) + 2)) + 64

    def __iter__(self):
        for pos, (lo, hi) in enumerate(self.ranges):
            if pos in self._cache:
                yield self._cache[pos]
                continue
            chunk = self.design.chunk(lo, hi)
            if self.keep:
                self._cache[pos] = chunk
            yield chunk


def _p_normal(z):
    return float(2 * stats.norm.sf(abs(z))) if np.isfinite(z) else math.nan


def _chi2(stat, df):
    """A chi-squared test; None when it has no degrees of freedom (an exactly or
    under-identified instrument set has nothing to test)."""
    if df is None or df <= 0:
        return None
    if not np.isfinite(stat):
        return TestResult(float(stat), math.nan, int(df))
    return TestResult(float(stat), float(stats.chi2.sf(stat, df)), int(df))


def efficient_gmm(zx, zy, weight):
    """``b = (X'Z W Z'X)⁻¹ X'Z W Z'y`` and ``(X'Z W Z'X)⁻¹``."""
    xzw = zx.T @ weight
    bread = xzw @ zx
    bread_inv = sym_pinv(bread)[0] if np.linalg.matrix_rank(bread) < bread.shape[0] else np.linalg.inv(bread)
    return bread_inv @ (xzw @ zy), bread_inv


def hansen_statistic(zx, zy, weight, beta):
    ze = zy - zx @ beta
    return float(ze @ weight @ ze)


class GMMProblem:
    """The moment sums of one model and the estimators built on them."""

    def __init__(self, spec: Spec, panel: Panel, chunk_units: int | None = None):
        self.spec = spec
        self.design = Design(spec, panel)
        self.source = ChunkSource(self.design, chunk_units)
        self.warnings: list[str] = []
        self._first_pass()

    # ---------------------------------------------------------------- passes
    def _first_pass(self):
        d = self.design
        L, K = d.L_all, len(d.x_labels_all)
        zx = np.zeros((L, K)); zy = np.zeros(L); zhz = np.zeros((L, L)); xx = np.zeros((K, K))
        fd_weight = not d.fod
        for chunk in self.source:
            a, b, c, e = first_moments(chunk, L, K, fd_weight)
            zx += a; zy += b; zhz += c; xx += e
        keep_x = independent_columns(xx)
        dropped = [d.x_labels_all[j] for j in range(K) if j not in set(keep_x.tolist())]
        bad = [lab for lab in dropped if not is_deterministic_label(lab)]
        if bad:
            raise EstimationError(
                "regressor(s) with no independent variation after the transform: "
                f"{', '.join(bad)} (constant within every unit, or collinear with other regressors)")
        d.set_kept_columns(keep_x)
        nonzero = np.diag(zhz) > 0
        d.keep_z = np.asarray([j for j in d.keep_z if nonzero[j]], dtype=int)
        kz, kx = d.keep_z, d.keep_x
        self.zx = zx[np.ix_(kz, kx)]
        self.zy = zy[kz]
        self.zhz = zhz[np.ix_(kz, kz)]
        self.L, self.K = len(kz), len(kx)
        n_rows = d.n_rows[0] + d.n_rows[1]
        if d.n_rows[0] <= self.K:
            raise EstimationError(
                f"only {d.n_rows[0]} observations in the transformed equation for {self.K} "
                "parameters: too few observations for this model")
        if self.L >= n_rows:
            raise EstimationError(
                f"{self.L} instruments for only {n_rows} observations: reduce last_lag, "
                "use collapsed instruments or add data")
        if self.L < self.K:
            raise EstimationError(
                f"fewer instruments ({self.L}) than parameters ({self.K}): the model is not identified")

    def unit_moments_at(self, beta):
        """Σ g g' and Σ g, and the transformed-equation sum of squared residuals, at ``beta``."""
        d = self.design
        S = np.zeros((self.L, self.L))
        ssr = 0.0
        for chunk in self.source:
            res = residuals(chunk, beta, d.keep_x)
            g = unit_moments(chunk, res, d.L_all, d.keep_z)
            S += g.T @ g
            ssr += float((res[TRANSFORMED] ** 2).sum())
        return S, ssr

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

    # -------------------------------------------------------- final pass terms
    def final_pass(self, beta, beta_prev, weight, need_windmeijer):
        """Windmeijer terms and Arellano–Bond AR(m) sums at the final estimate.

        Windmeijer (2005): with ``a = W Z'e`` (final residuals) and per-unit
        ``g_i = Z_i' e_i(b_prev)``, ``q_ik = Z_i' x_ik``, the derivative of ``S`` along
        ``b_k`` applied to ``a`` is ``Σ_i q_ik (g_i'a) + g_i (q_ik'a)``; summed as two
        batched products per chunk (no L×L×K array is ever formed).
        """
        d = self.design
        L, K = self.L, self.K
        ze = self.zy - self.zx @ beta
        a = weight @ ze
        T = np.zeros((L, K))
        ar = {m: {"s": 0.0, "s2": 0.0, "wx": np.zeros(K), "gs": np.zeros(L), "pairs": 0} for m in (1, 2)}
        for chunk in self.source:
            res = residuals(chunk, beta, d.keep_x)
            g = unit_moments(chunk, res, d.L_all, d.keep_z)
            if need_windmeijer:
                res_p = residuals(chunk, beta_prev, d.keep_x)
                gp = unit_moments(chunk, res_p, d.L_all, d.keep_z)
                q = unit_instrument_regressor(chunk, d.L_all, d.keep_z, d.keep_x)
                T += np.einsum("nlk,n->lk", q, gp @ a) + gp.T @ np.einsum("nlk,l->nk", q, a)
            # AR(m): differenced level residuals (Arellano & Bond 1991, eq. (8))
            xlev = chunk.xlev[:, :, d.keep_x]
            elev = np.where(chunk.complete, chunk.ylev - xlev @ beta, 0.0)
            dmask = np.zeros_like(chunk.complete)
            dmask[:, 1:] = chunk.complete[:, 1:] & chunk.complete[:, :-1]
            u = np.zeros_like(elev)
            u[:, 1:] = elev[:, 1:] - elev[:, :-1]
            u = np.where(dmask, u, 0.0)
            dx = np.zeros_like(xlev)
            dx[:, 1:] = xlev[:, 1:] - xlev[:, :-1]
            dx = np.where(dmask[:, :, None], dx, 0.0)
            for m in (1, 2):
                if u.shape[1] <= m:
                    continue
                pair = dmask[:, m:] & dmask[:, :-m]
                w = np.where(pair, u[:, :-m], 0.0)
                s = (w * u[:, m:]).sum(axis=1)
                acc = ar[m]
                acc["s"] += float(s.sum())
                acc["s2"] += float(s @ s)
                acc["wx"] += np.einsum("np,npk->k", w, dx[:, m:])
                acc["gs"] += g.T @ s
                acc["pairs"] += int(pair.sum())
        return T, ar


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


def fit(spec: Spec, panel: Panel, *, chunk_units: int | None = None) -> FitResult:
    """Estimate one model (difference or system GMM) on a panel."""
    with _warnings.catch_warnings():
        _warnings.simplefilter("ignore", RuntimeWarning)
        return _fit(spec, panel, chunk_units)


def _fit(spec, panel, chunk_units):
    prob = GMMProblem(spec, panel, chunk_units)
    d = prob.design
    L, K = prob.L, prob.K
    beta1, A, bread1, rank_a = prob.one_step()
    S1, ssr1 = prob.unit_moments_at(beta1)
    ze1 = prob.zy - prob.zx @ beta1
    W1, rank_s1 = sym_pinv(S1)
    # robust one-step variance (clustered by unit)
    m1 = bread1 @ prob.zx.T @ A
    v1_robust = m1 @ S1 @ m1.T
    n_t = d.n_rows[TRANSFORMED]
    # σ² of the level error with a degrees-of-freedom correction: differenced errors
    # have variance 2σ² (H has 2 on its diagonal), deviations σ² (Arellano & Bover
    # 1995). With this divisor the Sargan statistic of Arellano & Bond (1991, Table 4
    # (a1)) is reproduced.
    sigma2 = ssr1 / ((n_t - K) * (1.0 if d.fod else 2.0))
    sargan = _chi2(float(ze1 @ A @ ze1) / sigma2, rank_a - K) if sigma2 > 0 else None

    steps = spec.steps
    iterations = 1
    if steps == 1:
        beta, weight, S_w, bread, beta_prev = beta1, A, S1, bread1, beta1
        hansen = _chi2(float(ze1 @ W1 @ ze1), rank_s1 - K)
        rank_w = rank_s1
    else:
        beta_prev = beta1
        S_w, rank_w = S1, rank_s1
        weight = W1
        beta, bread = efficient_gmm(prob.zx, prob.zy, W1)
        iterations = 2
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
                prob.warnings.append(f"iterated GMM did not converge in {MAX_ITERATIONS} steps")
        ze = prob.zy - prob.zx @ beta
        hansen = _chi2(float(ze @ weight @ ze), rank_w - K)
    if rank_w < L:
        prob.warnings.append(
            f"the robust weight matrix is singular (rank {rank_w} of {L} instruments; "
            f"{d.unit_has_rows.sum()} units); a pseudo-inverse was used and the Hansen test is weak")

    need_w = steps != 1
    T, ar = prob.final_pass(beta, beta_prev, weight, need_w)
    influence = bread @ prob.zx.T @ weight
    windmeijer_d = None
    if steps == 1:
        v_robust = v1_robust
        v_conv = sigma2 * bread1
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

    # difference-in-Hansen (Eichenbaum, Hansen & Singleton 1988; Hayashi 2000, §3.6):
    # C = J(all) − J(without the group), both efficient with blocks of the same S
    diff_hansen = {}
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
        df = rank_w - rank_sub
        if df <= 0:
            continue
        diff_hansen[group] = _chi2(j_full - j_sub, df)

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
        prob.warnings.append(f"{L} instruments outnumber the {units} units (common practice: keep "
                             "instruments at or below the number of units)")
    settings = dict(settings_of(spec))
    settings["iterations"] = iterations
    return FitResult(
        terms=tuple(terms),
        std_error_kind=kind,
        tests={"ar1": ar1, "ar2": ar2, "sargan": sargan, "hansen": hansen},
        difference_hansen=diff_hansen,
        counts=counts,
        warnings=tuple(dict.fromkeys(prob.warnings)),
        vcov=vcov,
        settings=settings,
        diagnostics={"windmeijer_d": windmeijer_d, "beta_one_step": beta1,
                     "vcov_one_step_robust": v1_robust, "sigma2": sigma2},
    )
