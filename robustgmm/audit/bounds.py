"""Pooled OLS and within (fixed-effects) bounds for the autoregressive coefficients.

In a dynamic panel ``y_it = Σ_l ρ_l y_i,t-l + x_it'β + η_i + ε_it`` pooled OLS omits
the unit effect ``η_i``, which is positively correlated with the lagged outcome, so
OLS is biased *up*; the within estimator removes ``η_i`` but the demeaned lag is
negatively correlated with the demeaned error, so it is biased *down* for short
panels (Nickell 1981, Econometrica 49(6) 1417–1426). A consistent GMM estimate of the
AR coefficient should therefore lie between the two (Bond, Hoeffler & Temple 2001,
CEPR DP 3048; Bond 2002, Portuguese Econ. J. 1 141–162). With several outcome lags
the band is checked for their sum (the persistence of the outcome).

Both regressions use the variant's own estimation sample
(:func:`robustgmm.core.estimation_sample`, the levels observations that enter the
GMM estimation) and the same regressors, in levels: every outcome lag, every
regressor term, and period dummies when the model has time effects (OLS: a constant
plus one dummy per period but the first; within: the demeaned dummies but the
first). Computation is batched numpy on the ``(N units × P periods)`` layout.

Standard errors are clustered by unit (Arellano 1987; the usual sandwich):

    V = c (X'X)^{-1} (Σ_i s_i s_i') (X'X)^{-1},   s_i = Σ_t x_it e_it,
    c = G/(G-1) · (n-1)/(n-k),

with G units, n observations and k coefficients (for the within estimator k counts
the slopes only: the unit effects are nested in the clusters). This is the small-
sample factor of statsmodels' ``cov_type="cluster"`` and of linearmodels'
``PanelOLS(..., cov_type="clustered", debiased=True, group_debias=True)``; the tests
check both to 1e-8.
"""
from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from ..errors import EstimationError
from ..spec import Spec

def sum_label(spec: Spec) -> str:
    """Label of the sum of the AR coefficients (used when the outcome has several lags)."""
    return "sum(" + ", ".join(spec.ar_terms()) + ")"


@dataclass(frozen=True)
class BoundEstimate:
    """OLS and within estimates of one AR coefficient (or of their sum)."""

    term: str
    ols: float
    ols_std_error: float
    fe: float
    fe_std_error: float

    @property
    def band(self) -> tuple[float, float]:
        """[lower, upper]: normally [FE, OLS]; ordered whatever the data give."""
        return (min(self.ols, self.fe), max(self.ols, self.fe))

    def contains(self, value: float) -> bool | None:
        """Whether ``value`` lies in the band (None when anything is missing)."""
        lo, hi = self.band
        if not (np.isfinite(value) and np.isfinite(lo) and np.isfinite(hi)):
            return None
        return bool(lo <= value <= hi)


@dataclass(frozen=True)
class Bounds:
    """Bounds of one variant's sample: every AR lag, then their sum if several."""

    terms: tuple[BoundEstimate, ...]
    observations: int
    units: int
    persistence: str  # label of the coefficient the band check uses (lag or sum)
    dropped: tuple[str, ...] = ()  # time-invariant terms the within regression drops

    def term(self, label: str) -> BoundEstimate:
        for b in self.terms:
            if b.term == label:
                return b
        raise KeyError(label)

    def to_dict(self) -> dict:
        return {
            "terms": [dict(term=b.term, ols=b.ols, ols_std_error=b.ols_std_error,
                           fe=b.fe, fe_std_error=b.fe_std_error) for b in self.terms],
            "observations": self.observations,
            "units": self.units,
            "persistence": self.persistence,
            "dropped": list(self.dropped),
        }


# ---------------------------------------------------------------------------
# regressions on the (N, P) layout
# ---------------------------------------------------------------------------
def _design(spec: Spec, panel, mask: np.ndarray):
    """Outcome (N,P), regressors (N,P,K) in levels, their labels, and the sample."""
    y = panel.values[spec.outcome]
    cols, labels = [], []
    for var, lag, label in spec.regressor_terms():
        cols.append(panel.lagged(var, lag))
        labels.append(label)
    X = np.stack(cols, axis=2) if cols else np.zeros(y.shape + (0,))
    sample = np.asarray(mask, dtype=bool) & np.isfinite(y) & np.isfinite(X).all(axis=2)
    return y, X, labels, sample


def _on_sample(arr: np.ndarray, sample: np.ndarray) -> np.ndarray:
    """(N,P,K) ``arr`` with every cell outside ``sample`` (N,P) set to zero, so that
    sums over units and periods are plain batched sums (those cells may be NaN)."""
    return np.where(sample[:, :, None], arr, 0.0)


def _period_dummies(sample: np.ndarray) -> np.ndarray:
    """(N,P,D) dummies for the periods that have observations, without the first."""
    present = np.flatnonzero(sample.any(axis=0))
    N, P = sample.shape
    D = np.zeros((N, P, max(len(present) - 1, 0)))
    for j, t in enumerate(present[1:]):  # loop over periods (few), not units
        D[:, t, j] = 1.0
    return D


def _independent_tail(xtx: np.ndarray, n_keep: int) -> np.ndarray:
    """Indices of columns to keep: the first ``n_keep`` always, then each later
    column only if it raises the rank (drops dummies collinear with the rest)."""
    keep = list(range(n_keep))
    scale = np.sqrt(np.maximum(np.diag(xtx), 1e-300))
    norm = xtx / np.outer(scale, scale)
    rank = np.linalg.matrix_rank(norm[np.ix_(keep, keep)]) if keep else 0
    for j in range(n_keep, xtx.shape[0]):
        if xtx[j, j] <= 0:
            continue
        trial = keep + [j]
        r = np.linalg.matrix_rank(norm[np.ix_(trial, trial)])
        if r > rank:
            keep, rank = trial, r
    return np.asarray(keep, dtype=int)


def cluster_ols(y: np.ndarray, X: np.ndarray, sample: np.ndarray
                ) -> tuple[np.ndarray, np.ndarray]:
    """OLS of ``y`` on ``X`` over the cells in ``sample`` with unit-clustered errors.

    ``y`` (N,P), ``X`` (N,P,K), ``sample`` (N,P) bool; rows are units (the clusters).
    Cells outside the sample are zeroed, so sums over units and periods are plain
    batched products. Returns (coefficients (K,), covariance (K,K)); the small-sample
    factor is ``G/(G-1) (n-1)/(n-k)`` (module docstring); for demeaned data the
    unit effects are not in ``k`` because they are nested in the clusters.
    """
    w = sample.astype(float)
    Xs = _on_sample(X, sample)
    ys = np.where(sample, y, 0.0)
    n = int(sample.sum())
    G = int(sample.any(axis=1).sum())
    K = X.shape[2]
    if G < 2:
        raise EstimationError("fewer than two units in the sample")
    if n <= K:
        raise EstimationError(f"{n} observations for {K} coefficients")
    flat_X = Xs.reshape(-1, K)
    xtx = flat_X.T @ flat_X
    xty = flat_X.T @ ys.reshape(-1)
    try:
        chol = np.linalg.cholesky(xtx)
    except np.linalg.LinAlgError:
        raise EstimationError("the regressors are collinear on the sample") from None
    beta = _chol_solve(chol, xty)
    resid = (ys - Xs @ beta) * w
    scores = np.einsum("npk,np->nk", Xs, resid)  # s_i = Σ_t x_it e_it, one row per unit
    meat = scores.T @ scores
    bread = _chol_solve(chol, np.eye(K))
    factor = G / (G - 1) * (n - 1) / (n - K)
    vcov = factor * bread @ meat @ bread
    return beta, (vcov + vcov.T) / 2


def _chol_solve(chol: np.ndarray, rhs: np.ndarray) -> np.ndarray:
    from scipy.linalg import cho_solve
    return cho_solve((chol, True), rhs)


def _demean(arr: np.ndarray, sample: np.ndarray) -> np.ndarray:
    """(N,P,K) minus each unit's mean over its sample cells; zero off the sample.

    Group means over the (N,P) layout as masked sums / counts (cells outside the
    sample, which may be NaN, never enter), one batched operation for all units.
    """
    vals = _on_sample(arr, sample)
    count = np.maximum(sample.sum(axis=1), 1)[:, None, None]
    means = vals.sum(axis=1, keepdims=True) / count
    return _on_sample(vals - means, sample)


def ols_and_within(spec: Spec, panel, mask: np.ndarray):
    """Pooled OLS and within regressions of the model on ``mask``.

    Returns ``(labels, (b_ols, V_ols), (b_fe, V_fe), sample, dropped)`` restricted
    to the regressor terms (dummies and constant dropped from the output).

    A term that does not vary within any unit on the sample (education, sector,
    founding cohort) is absorbed by the unit effect: its demeaned column is zero, so
    the within regression drops it (``dropped`` names it; its within estimate and
    standard error are NaN) and the band for the AR coefficients remains.
    """
    y, X, labels, sample = _design(spec, panel, mask)
    K = len(labels)
    if K == 0:
        raise EstimationError("the model has no regressors")
    D = _period_dummies(sample) if spec.time_effects else np.zeros(y.shape + (0,))
    # pooled OLS: terms, constant, period dummies (all but the first period)
    Xo = np.concatenate([X, np.ones(y.shape + (1,)), D], axis=2)
    keep = _keep_columns(Xo, sample, K + 1)
    b_ols, V_ols = cluster_ols(y, Xo[:, :, keep], sample)
    # within: demeaned terms and dummies, no constant
    yw = _demean(y[:, :, None], sample)[:, :, 0]
    Xw = _demean(np.concatenate([X, D], axis=2), sample)
    varies = _varies_within(X, Xw[:, :, :K], sample)
    dropped = tuple(lab for lab, v in zip(labels, varies) if not v)
    kept = np.flatnonzero(varies)
    Xk = np.concatenate([Xw[:, :, kept], Xw[:, :, K:]], axis=2)
    b_w, V_w = cluster_ols(yw, Xk[:, :, _keep_columns(Xk, sample, len(kept))], sample)
    k = len(kept)
    b_fe = np.full(K, np.nan)
    V_fe = np.full((K, K), np.nan)
    b_fe[kept] = b_w[:k]
    V_fe[np.ix_(kept, kept)] = V_w[:k, :k]
    return labels, (b_ols[:K], V_ols[:K, :K]), (b_fe, V_fe), sample, dropped


def _varies_within(X: np.ndarray, Xw: np.ndarray, sample: np.ndarray) -> np.ndarray:
    """(K,) bool: whether each term varies within units on the sample.

    A term is time-invariant when its within sum of squares is negligible against
    its total sum of squares (relative 1e-20, i.e. only rounding left after the
    demeaning), or it is zero everywhere on the sample.
    """
    ss_total = (_on_sample(X, sample) ** 2).sum(axis=(0, 1))
    ss_within = (Xw ** 2).sum(axis=(0, 1))
    return ss_within > 1e-20 * np.maximum(ss_total, 1e-300)


def _keep_columns(X: np.ndarray, sample: np.ndarray, n_keep: int) -> np.ndarray:
    Xs = _on_sample(X, sample).reshape(-1, X.shape[2])
    return _independent_tail(Xs.T @ Xs, n_keep)


def ar_bounds(spec: Spec, panel, mask: np.ndarray) -> Bounds:
    """OLS and within estimates of each AR coefficient (and their sum) on ``mask``.

    ``mask`` is the variant's estimation sample (N,P) bool. Raises
    :class:`EstimationError` when the regressions cannot be run.
    """
    labels, (bo, Vo), (bf, Vf), sample, dropped = ols_and_within(spec, panel, mask)
    ar = list(spec.ar_terms())
    idx = [labels.index(a) for a in ar]
    out = []
    for a, i in zip(ar, idx):
        out.append(BoundEstimate(a, float(bo[i]), float(np.sqrt(Vo[i, i])),
                                 float(bf[i]), float(np.sqrt(Vf[i, i]))))
    persistence = ar[0]
    if len(ar) > 1:
        ones = np.zeros(len(labels))
        ones[idx] = 1.0
        out.append(BoundEstimate(sum_label(spec), float(ones @ bo), float(np.sqrt(ones @ Vo @ ones)),
                                 float(ones @ bf), float(np.sqrt(ones @ Vf @ ones))))
        persistence = sum_label(spec)
    return Bounds(terms=tuple(out), observations=int(sample.sum()),
                  units=int(sample.any(axis=1).sum()), persistence=persistence,
                  dropped=dropped)


# ---------------------------------------------------------------------------
# Nickell's large-N bias of the within estimator (used by the tests and docs)
# ---------------------------------------------------------------------------
def nickell_bias(rho: float, T: int) -> float:
    """plim (ρ̂_FE − ρ) as N → ∞ for ``y_it = ρ y_i,t-1 + η_i + ε_it`` with T periods
    in the within regression and a stationary start (Nickell 1981, Econometrica
    49(6), the large-N bias of the within estimator; formula from memory, verified
    in the tests against the exact quadratic-form computation):

        −(1+ρ)/(T−1) · A / {1 − [2ρ / ((1−ρ)(T−1))] · A},
        A = 1 − (1/T) (1−ρ^T)/(1−ρ).
    """
    A = 1.0 - (1.0 - rho ** T) / (T * (1.0 - rho))
    return -(1.0 + rho) / (T - 1) * A / (1.0 - 2.0 * rho / ((1.0 - rho) * (T - 1)) * A)
