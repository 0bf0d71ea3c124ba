"""Instrument strength: rank (underidentification) tests and conditional first-stage F.

Identification of a GMM model needs ``rank E[Z_i'X_i] = K`` (Hansen 1982; Hayashi
2000, section 3.2). With many or persistent instruments the rank condition can hold
only barely (weak instruments: Blundell & Bond 1998; Bun & Windmeijer 2010), so we
measure it. ``Q = Σ_i q_i``, ``q_i = Z_i'X_i`` (L × K, stacked transformed and level
rows, every kept column), is a sum over independent units, so ``vec(Q)/N`` is
asymptotically normal with the unit-clustered covariance of ``vec(q_i)``.

**Rank statistic** (Kleibergen & Paap 2006, J. Econometrics 133(1) 97–126). For the
normalised ``Θ = G Q F'`` (here ``G = (Z'HZ)^(-1/2)``, the one-step weight's root,
and ``F = (X'X)^(-1/2)``; any fixed non-singular pair gives the same limit under the
null) with singular value decomposition ``Θ = U S V'``, the test of
``rank = K − 1`` uses ``λ = U₂' Θ v_K`` (``v_K`` the last right singular vector,
``U₂`` the last ``L − K + 1`` left ones; KP's ``A⊥, B⊥`` differ from these by
non-singular factors, which cancel in the quadratic form). Per unit
``λ_i = U₂' G q_i F' v_K = U₂' G Z_i'(X_i f)``, ``f = F' v_K``, so one pass over the
units with one coefficient-like vector gives ``Λ = Σ λ_i`` and its spread:

* ``rk Wald = Λ' [Σ (λ_i − λ̄)(λ_i − λ̄)']⁻¹ Λ`` (covariance not restricted);
* ``rk LM = Λ' [Σ λ_i λ_i']⁻¹ Λ = W / (1 + W/N)`` (covariance with ``E λ_i = 0``
  imposed, which holds under the null; the score form; our construction of the LM
  variant);

both ``χ²(L − K + 1)`` under the null of underidentification for fixed ``L`` as
``N → ∞``. ``rk F = rk Wald / (L − K + 1)`` (no small-sample factor). For each
equation of system GMM the same statistic is computed on that equation's
instruments and the terms they move.

**Conditional F** (Sanderson & Windmeijer 2016, J. Econometrics 190(2) 212–221) of a
term ``x_j``: ``x_j`` regressed by GMM on the other terms with instruments ``Z``
(one-step weight, then the robust weight ``S_j`` at the one-step residual), and the
minimised criterion ``J_j`` divided by ``L − K + 1``. With homoskedastic errors and
the two-stage least squares weight this is their conditional F; the cluster-robust
weight is our construction (the Hansen J of the auxiliary regression, ``χ²(L − K + 1)``
when ``x_j`` is not identified given the others).

**Where the distribution is not valid** (reported with a reason, never a p-value):
the covariance of ``λ`` (``df × df`` from ``N`` units) singular, or the degrees of
freedom above :data:`MAX_DF_SHARE` of the units (the many-instruments case, where the
chi-squared approximation fails; the size measured by simulation is in
docs/method.md). The F statistics are compared with the rule of thumb F < 10
(Staiger & Stock 1997; common practice): no critical values exist for
cluster-robust GMM first stages, and the report says so.
"""
from __future__ import annotations

import math

import numpy as np
from scipy import special

from ..spec import is_deterministic_label
from .design import LEVEL, TRANSFORMED
from .moments import moment_plan, unit_moments_t
from .results import TestResult

#: the chi-squared approximation of the rank statistics is trusted only while their
#: degrees of freedom stay at or below this share of the units (robustgmm default,
#: from the size measured by simulation, docs/method.md)
MAX_DF_SHARE = 0.1
EQUATIONS = {"system": None, "transformed": TRANSFORMED, "level": LEVEL}


def _inv_sqrt(m: np.ndarray) -> np.ndarray | None:
    """Symmetric inverse square root of a positive definite matrix (rescaled to a
    unit diagonal first, so units do not matter); None when it is singular."""
    d = np.sqrt(np.clip(np.diag(m), 0, None))
    if not np.all(d > 0):
        return None
    s = m / d[:, None] / d[None, :]
    vals, vecs = np.linalg.eigh(0.5 * (s + s.T))
    if vals.min() <= vals.max() * len(vals) * 1e-12:
        return None
    root = (vecs / np.sqrt(vals)) @ vecs.T  # (D⁻¹ M D⁻¹)^(-1/2)
    # G with G M G' = I: G = root · D⁻¹
    return root / d[None, :]


class _Block:
    """The rank test of one instrument set (rows) and its terms (columns)."""

    def __init__(self, name, rows, cols, zx, zhz, xx, K_all):
        self.name, self.rows, self.cols = name, rows, cols
        self.L, self.K = len(rows), len(cols)
        self.df = self.L - self.K + 1
        self.reason = None
        self.P = self.f = None
        if self.K == 0:
            self.reason = "no term is moved by these instruments"
            return
        if self.df < 1:
            self.reason = (f"{self.L} instruments for {self.K} terms: these instruments "
                           "alone cannot identify them")
            return
        G = _inv_sqrt(zhz[np.ix_(rows, rows)])
        F = _inv_sqrt(xx[np.ix_(cols, cols)])
        if G is None or F is None:
            self.reason = "not valid: the instrument or regressor cross products are singular"
            return
        theta = G @ zx[np.ix_(rows, cols)] @ F.T
        U, _s, Vt = np.linalg.svd(theta)
        self.P = U[:, self.K - 1:].T @ G  # df × L_block
        self.f = np.zeros(K_all)            # over every kept term (zero outside the block)
        self.f[cols] = F.T @ Vt[-1]


class StrengthSums:
    """Task: per-unit sums for the rank statistics and the conditional F.

    For each vector ``f`` over the kept terms it sums ``u_i = Z_i'X_i f`` (L) and
    ``Σ u_i u_i'``, from which every statistic is a small computation."""

    def __init__(self, prob, vectors, rows=None):
        self.prob = prob
        self.vectors = [np.asarray(v, dtype=float) for v in vectors]
        L = prob.L
        self.sum = [np.zeros(L) for _ in self.vectors]
        self.outer = [np.zeros((L, L)) for _ in self.vectors]
        # every vector spread over the design's columns, as rows: (m, K_all)
        self._f_rows = (np.stack([prob.beta_all(f) for f in self.vectors])
                        if self.vectors else np.zeros((0, prob.K_all)))
        # a vector whose statistic reads only some instruments (``rows``: one
        # equation's) sums u over those (the rest of its sums stay zero, unread)
        rows = [None] * len(self.vectors) if rows is None else list(rows)
        self._parts = [_restricted(prob, r) for r in rows]

    def __call__(self, ctx):
        prob, pc = self.prob, ctx.pc
        if not self.vectors:
            return
        xf = _rows_times(pc, self._f_rows)
        for acc, out, rows, (sub, scatter, entries, plan) in zip(self.sum, self.outer, xf,
                                                                  self._parts):
            u = unit_moments_t(pc, ctx.layout, rows, scatter, ctx.scratch(), entries, plan)
            if sub is None:
                acc += u.sum(axis=1)
                out += u @ u.T
            else:
                acc[sub] += u.sum(axis=1)
                out[np.ix_(sub, sub)] += u @ u.T


def _restricted(prob, rows):
    """``(rows, scatter, entries)`` of :func:`.moments.unit_moments_t` for the moments
    of the instrument positions ``rows`` only (None: all of them, the full scatter)."""
    layout = prob.engine.layout
    if rows is None or len(rows) == prob.L:
        return None, prob.scatter, None, prob.moment_plan
    rows = np.asarray(rows, dtype=np.int64)
    scatter = prob.scatter[rows]
    if not scatter.nnz:
        return rows, scatter, None, None
    # the entries that feed these instruments lie in one range (an equation's
    # blocks are contiguous); the few others in it only add zero columns
    lo, hi = int(scatter.indices.min()), int(scatter.indices.max()) + 1
    scatter = scatter[:, lo:hi].tocsr()
    return rows, scatter, (lo, hi), moment_plan(scatter, layout, offset=lo)


def _rows_times(pc, f_rows: np.ndarray) -> np.ndarray:
    """``X f`` of every row slot for each vector ``f`` (rows of ``f_rows``), laid out
    as residual rows: (m, R, n). One small product per row slot, ``F (K × n)``, that
    writes the slot's rows of every vector at once (no transposed copies)."""
    m, n = len(f_rows), pc.n
    out = np.empty((m, sum(x.shape[1] for x in pc.x), n))
    slot = 0
    for x in pc.x:
        for t in range(x.shape[1]):
            np.matmul(f_rows, x[:, t, :].T, out=out[:, slot, :])
            slot += 1
    return out


def blocks(prob) -> dict:
    """The rank-test blocks of a problem: the whole system and, in system GMM, each
    equation's instruments with the terms they move."""
    d = prob.design
    eq_of = np.asarray([d.z_columns[j].equation for j in d.keep_z])
    zx, zhz = prob.zx, prob.zhz
    xx = prob.engine.first()[3][np.ix_(prob.keep_x, prob.keep_x)]
    deterministic = np.asarray([is_deterministic_label(lab) for lab in d.x_labels], bool)
    out = {"system": _Block("system", np.arange(prob.L), np.arange(prob.K), zx, zhz, xx, prob.K)}
    if d.system:
        for name in ("transformed", "level"):
            rows = np.flatnonzero(eq_of == EQUATIONS[name])
            # the regressor terms that these instruments move (the constant and the
            # period dummies are left to the whole system: in system GMM most
            # transformed-equation time moments are redundant, so the transformed
            # instruments alone never identify the time effects)
            sub = np.abs(zx[rows])
            scale = np.abs(zx).max(axis=0)
            moved = sub.max(axis=0) > 1e-12 * np.where(scale > 0, scale, 1.0) \
                if len(rows) else np.zeros(prob.K, bool)
            cols = np.flatnonzero(moved & ~deterministic)
            out[name] = _Block(name, rows, cols, zx, zhz, xx, prob.K)
    return out


def conditional_vectors(prob, labels, A) -> dict:
    """``{label: (j, f_j)}``: the one-step coefficients of the auxiliary regressions,
    ``f_j = e_j − [δ_j]`` with ``δ_j = (Q₋ⱼ'AQ₋ⱼ)⁻¹ Q₋ⱼ'A Q_j``."""
    zx = prob.zx
    out = {}
    for label in labels:
        j = prob.design.x_labels.index(label)
        others = [k for k in range(prob.K) if k != j]
        qo = zx[:, others]
        f = np.zeros(prob.K)
        f[j] = 1.0
        if others:
            delta = np.linalg.lstsq(qo.T @ A @ qo, qo.T @ A @ zx[:, j], rcond=None)[0]
            f[others] = -delta
        out[label] = (j, f)
    return out


def instrumented_terms(spec, prob) -> list[str]:
    """The terms whose instruments are lagged levels or differences (GMM style): the
    lags of the outcome and of endogenous or predetermined regressors."""
    from ..options import Role, parse
    from ..spec import term_label

    labels = set(prob.design.x_labels)
    out = [a for a in spec.ar_terms() if a in labels]
    for reg in spec.regressors:
        if parse(Role, reg.role) != Role.EXOGENOUS:
            out += [term_label(reg.name, lag) for lag in reg.lags
                    if term_label(reg.name, lag) in labels]
    return [x for x in dict.fromkeys(out) if not is_deterministic_label(x)]


def _quadratic(total, outer, n, centred):
    m = outer - (np.outer(total, total) / n if centred else 0.0)
    vals, vecs = np.linalg.eigh(0.5 * (m + m.T))
    if vals.size == 0 or vals.min() <= vals.max() * len(vals) * 1e-10:
        return None
    return float(total @ ((vecs / vals) @ (vecs.T @ total)))


def _p(stat, df):
    return float(special.chdtrc(df, stat))


def rank_tests(block: _Block, total, outer, units):
    """``(rk LM, rk Wald)`` as :class:`TestResult` of one block from the sums of
    ``u_i`` over units (module docstring)."""
    if block.reason:
        na = TestResult(math.nan, math.nan, block.df if block.df > 0 else None, block.reason)
        return na, na
    lam_total = block.P @ total[block.rows]
    lam_outer = block.P @ outer[np.ix_(block.rows, block.rows)] @ block.P.T
    df = block.df
    reason = None
    if df > MAX_DF_SHARE * units:
        reason = (f"not valid: {df} degrees of freedom for {units} units (above "
                  f"{MAX_DF_SHARE:g} per unit: too many instruments for the chi-squared "
                  "approximation)")
    wald = _quadratic(lam_total, lam_outer, units, True)
    if wald is None and reason is None:
        reason = ("not valid: the covariance of the rank statistic is singular (too many "
                  "instruments for the units)")
    if reason:
        na = TestResult(math.nan, math.nan, df, reason)
        return na, na
    lm = wald / (1.0 + wald / units)
    return TestResult(lm, _p(lm, df), df), TestResult(wald, _p(wald, df), df)


def conditional_f(prob, j, total, outer, units) -> TestResult:
    """Conditional F of one term from the sums at its one-step auxiliary residual:
    two-step weight ``S_j⁻¹``, minimised criterion ``J_j``, ``F = J_j / df``
    (:class:`TestResult` with ``statistic = F`` and the p-value of ``J_j``)."""
    df = prob.L - prob.K + 1
    if df < 1:
        return TestResult(math.nan, math.nan, None, "exactly identified: nothing to measure")
    if df > MAX_DF_SHARE * units:
        return TestResult(math.nan, math.nan, df,
                          f"not valid: {df} degrees of freedom for {units} units (above "
                          f"{MAX_DF_SHARE:g} per unit: too many instruments)")
    vals, vecs = np.linalg.eigh(0.5 * (outer + outer.T))
    if vals.min() <= vals.max() * len(vals) * 1e-10:
        return TestResult(math.nan, math.nan, df,
                          "not valid: the weight of the auxiliary regression is singular "
                          "(too many instruments for the units)")
    W = (vecs / vals) @ vecs.T
    others = [k for k in range(prob.K) if k != j]
    zx = prob.zx
    qo = zx[:, others]
    f2 = np.zeros(prob.K)
    f2[j] = 1.0
    if others:
        f2[others] = -np.linalg.lstsq(qo.T @ W @ qo, qo.T @ W @ zx[:, j], rcond=None)[0]
    g = zx @ f2
    J = float(g @ W @ g)
    return TestResult(J / df, _p(J, df), df)


def plan(spec, prob, A):
    """The sums one pass must collect for the strength statistics of ``prob``:
    ``(blocks, conditional vectors, StrengthSums task)``."""
    blks = blocks(prob)
    cond = conditional_vectors(prob, instrumented_terms(spec, prob), A)
    live = [b for b in blks.values() if b.reason is None]
    vectors = [b.f for b in live] + [f for _, f in cond.values()]
    rows = [b.rows for b in live] + [None] * len(cond)
    return blks, cond, StrengthSums(prob, vectors, rows)


def statistics(prob, planned) -> dict:
    """``{"rank_lm": {block: TestResult}, "rank_wald": {...}, "conditional_f":
    {term: TestResult}}`` from the sums of :func:`plan`'s task."""
    blks, cond, task = planned
    units = int(prob.design.unit_has_rows.sum())
    out = {"rank_lm": {}, "rank_wald": {}, "conditional_f": {}}
    i = 0
    for name, b in blks.items():
        if b.reason is None:
            lm, wald = rank_tests(b, task.sum[i], task.outer[i], units)
            i += 1
        else:
            lm, wald = rank_tests(b, None, None, units)
        out["rank_lm"][name], out["rank_wald"][name] = lm, wald
    for label, (j, _f) in cond.items():
        out["conditional_f"][label] = conditional_f(prob, j, task.sum[i], task.outer[i], units)
        i += 1
    return out
