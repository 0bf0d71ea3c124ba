"""Specification tests of a fit: AR(m), Sargan, Hansen J and difference-in-Hansen.

Each test is reported only where it has the distribution it claims; where it does
not, it is a :class:`TestResult` with no statistic and a ``reason``:

* **Sargan** (Sargan 1958; Arellano & Bond 1991): ``ê₁'Z A Z'ê₁ / σ̂²`` is χ² under
  homoskedasticity only when the one-step weight ``A`` is proportional to the inverse
  covariance of the moments: in difference GMM (first differences with ``H``,
  forward orthogonal deviations with the identity). In system GMM the weight
  ``diag(H, I)`` ignores that the level errors contain ``η_i`` and are correlated
  with the differenced ones, so the statistic is not χ² even with homoskedastic
  shocks (measured: 27.7% rejections at the 5% level; docs/method.md) and is not
  reported.
* **Hansen J** (Hansen 1982): the minimised criterion of the efficient estimator,
  ``J = n·ḡ(b)' Ŝ⁻¹ ḡ(b)``. For two-step and iterated fits it is the criterion at
  the final estimate with the weight used to obtain it; for a one-step fit it is the
  criterion of the efficient estimator with weight ``S(b₁)⁻¹`` (the same J(all) as
  the difference-in-Hansen), not the one-step estimate plugged into that weight,
  which is not a minimised criterion and over-rejects.
* **difference-in-Hansen** (Eichenbaum, Hansen & Singleton 1988; Hayashi 2000,
  section 3.6): ``C = J(all) − J(without the group)``, both efficient with blocks of
  the same ``S``; defined only when the model without the group is identified
  (rank of its ``Z'X`` equal to the number of parameters); degrees of freedom are
  the rank difference of the two weights.
* Degrees of freedom of Sargan and Hansen: ``rank(weight) − rank(Z'X)`` (the kept
  regressors are identified, so ``rank(Z'X) = K``).
* A statistic below ``−NEGATIVE_RTOL`` relative to its scale is a numerical failure:
  recorded as a warning, with no statistic and no p-value; a rounding-sized negative
  value is set to zero.
"""
from __future__ import annotations

import math

import numpy as np
from scipy import special

from .linalg import identified_columns
from .problem import efficient_gmm
from .results import TestResult

#: A quadratic-form statistic below −NEGATIVE_RTOL × its scale is a numerical failure.
NEGATIVE_RTOL = 1e-8

SARGAN_SYSTEM_REASON = ("not available in system GMM: the one-step weight diag(H, I) is not "
                        "proportional to the covariance of the stacked errors (the level errors "
                        "contain the unit effect), so the statistic is not chi-squared")


def p_normal(z):
    """Two-sided normal p-value ``2·(1 − Φ(|z|))``."""
    # scipy.special.ndtr is what scipy.stats.norm.sf calls, without the distribution
    # machinery (about 100 µs a call, thousands of calls an audit)
    return float(2 * special.ndtr(-abs(z))) if np.isfinite(z) else math.nan


def not_available(reason: str, df: int | None = None) -> TestResult:
    return TestResult(math.nan, math.nan, df, reason=reason)


def chi2(stat, df, scale: float | None = None, warnings: list | None = None,
         name: str = "test"):
    """A chi-squared test; None when it has no degrees of freedom (an exactly
    identified instrument set has nothing to test).

    ``scale``: the size the statistic is compared with to recognise a numerical
    failure (a negative value below ``−NEGATIVE_RTOL·scale``; see the module
    docstring)."""
    if df is None or df <= 0:
        return None
    if not np.isfinite(stat):
        return not_available("numerical failure: the statistic is not finite", int(df))
    if stat < 0:
        ref = abs(scale) if scale is not None and np.isfinite(scale) and scale > 0 else 1.0
        if stat < -NEGATIVE_RTOL * ref:
            reason = f"numerical failure: negative statistic ({stat:.6g})"
            if warnings is not None:
                warnings.append(f"{name}: {reason}; not reported")
            return not_available(reason, int(df))
        stat = 0.0
    # upper tail of χ²(df): scipy.special.chdtrc, as in scipy.stats.chi2.sf
    return TestResult(float(stat), float(special.chdtrc(df, stat)), int(df))


def criterion(zx, zy, weight, beta) -> float:
    """``(Z'y − Z'X b)' W (Z'y − Z'X b)``."""
    ze = zy - zx @ beta
    return float(ze @ weight @ ze)


def criterion_scale(zy, weight) -> float:
    """The criterion at ``b = 0``, ``y'Z W Z'y``: the scale against which a negative
    value is judged (it has the units of the criterion)."""
    return float(zy @ weight @ zy)


def ar_test(acc, influence, vcov):
    """Arellano & Bond (1991, eq. (8)) m-statistic, with the estimator's influence
    ``M`` (``b - β ≈ M Σ Z_i'e_i``) and covariance ``V``:
    ``m = Σ s_i / sqrt(Σ s_i² − 2 w'X M Σ g_i s_i + w'X V X'w)``, ``s_i = w_i'u_i``."""
    if acc["pairs"] == 0:
        return None
    wx = acc["wx"]
    var = acc["s2"] - 2.0 * wx @ influence @ acc["gs"] + wx @ vcov @ wx
    if not var > 0:
        return not_available("numerical failure: the variance of the statistic is not positive")
    z = acc["s"] / math.sqrt(var)
    return TestResult(float(z), p_normal(z), None)


def sargan(prob, one) -> TestResult | None:
    """Sargan's statistic at the one-step estimate (module docstring)."""
    if prob.design.system:
        return not_available(SARGAN_SYSTEM_REASON)
    if not one.sigma2 > 0:
        return not_available("numerical failure: the estimated shock variance is not positive")
    ze1 = prob.zy - prob.zx @ one.beta
    stat = float(ze1 @ one.A @ ze1) / one.sigma2
    scale = criterion_scale(prob.zy, one.A) / one.sigma2
    return chi2(stat, one.rank_a - prob.K, scale, one.warnings, "Sargan")


def difference_hansen(prob, S, W, rank_w, b_full, warnings: list, groups=None) -> dict:
    """Difference-in-Hansen per instrument group (module docstring).

    ``S``: the moment covariance of the weight; ``W``/``rank_w``: its inverse and
    rank; ``b_full``: the efficient estimate with ``W``; ``groups``: the groups to
    test (None: every group; each test depends on its own group only). A group whose
    removal leaves the model unidentified is reported as not testable, with the
    reason."""
    d = prob.design
    L, K = prob.L, prob.K
    out = {}
    todo = {g: pos for g, pos in d.instrument_groups().items()
            if len(pos) and (groups is None or g in groups)}
    if not todo:
        return out
    j_full = criterion(prob.zx, prob.zy, W, b_full)
    row_scale = prob.z_scale
    col_scale = np.ones(K)  # the rank decision is relative to each column's norm
    for group, pos in todo.items():
        keep = np.setdiff1d(np.arange(L), pos)
        if len(keep) < K or not identified_columns(prob.zx[keep], row_scale[keep],
                                                   col_scale).all():
            out[group] = not_available(
                "not testable: without this group the model is not identified "
                "(rank of Z'X below the number of parameters)")
            continue
        w_sub, rank_sub = prob.weight_from(S[np.ix_(keep, keep)], keep)
        df = rank_w - rank_sub
        if df <= 0:
            continue
        b_sub, _ = efficient_gmm(prob.zx[keep], prob.zy[keep], w_sub)
        j_sub = criterion(prob.zx[keep], prob.zy[keep], w_sub, b_sub)
        out[group] = chi2(j_full - j_sub, df, max(abs(j_full), abs(j_sub),
                                                  criterion_scale(prob.zy, W)),
                          warnings, f"difference-in-Hansen ({group})")
    return out
