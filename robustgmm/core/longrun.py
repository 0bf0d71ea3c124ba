"""Long-run effects of the regressors and their delta-method standard errors.

In ``y_it = Σ_p ρ_p y_i,t-p + Σ_l β_l x_i,t-l + ... + η_i + v_it`` a permanent unit
change in ``x`` moves the steady state of ``y`` by

    θ = Σ_l β_l / (1 − Σ_p ρ_p)

(the long-run multiplier of an autoregressive distributed-lag model, a textbook
result). Its standard error is the delta method on the
variant's own covariance ``V`` of the coefficients (Windmeijer-corrected where that is
the variant's kind): with ``s_β = Σ_l β_l``, ``s_ρ = Σ_p ρ_p``,

    ∂θ/∂β_l = 1 / (1 − s_ρ),   ∂θ/∂ρ_p = s_β / (1 − s_ρ)²,   se(θ) = sqrt(g' V g).

When ``s_ρ ≥ 1`` the process has no steady state and the effect is not defined: the
estimate is NaN with that reason. Near ``s_ρ = 1`` the ratio's sampling distribution
is far from normal (its denominator can come close to 0), so the normal test is then
a poor approximation: a warning says so when ``1 − s_ρ`` is within two of its
standard errors of zero (the same caution as for any ratio estimator; the delta
method needs the denominator bounded away from 0).
"""
from __future__ import annotations

import math

import numpy as np

from ..spec import Spec, long_run_label, term_label
from .results import TermEstimate


def parts(spec: Spec, labels) -> list[tuple[str, list[int], list[int]]]:
    """``(label, regressor term positions, AR term positions)`` for every regressor
    whose terms all appear in ``labels`` (a regressor a variant drops has no
    long-run effect in it)."""
    labels = list(labels)
    ar = [labels.index(a) for a in spec.ar_terms() if a in labels]
    if len(ar) < len(spec.outcome_lags):
        return []
    out = []
    for reg in spec.regressors:
        mine = [term_label(reg.name, lag) for lag in reg.lags]
        if all(m in labels for m in mine):
            out.append((long_run_label(reg.name), [labels.index(m) for m in mine], ar))
    return out


def value(beta: np.ndarray, idx, ar) -> float:
    """θ = Σ β / (1 − Σ ρ) (NaN when Σ ρ ≥ 1)."""
    s_r = float(np.sum(beta[ar]))
    return math.nan if s_r >= 1 else float(np.sum(beta[idx])) / (1.0 - s_r)


def gradient(beta: np.ndarray, idx, ar) -> np.ndarray:
    """∂θ/∂b over every coefficient (zero outside the regressor's and AR terms)."""
    g = np.zeros(len(beta))
    denom = 1.0 - float(np.sum(beta[ar]))
    g[idx] = 1.0 / denom
    g[ar] += float(np.sum(beta[idx])) / denom ** 2
    return g


def long_run_effects(spec: Spec, labels, beta, vcov) -> tuple[tuple[TermEstimate, ...], list[str]]:
    """The long-run effect of every regressor (module docstring) and the warnings."""
    from .diagnostics import p_normal

    beta = np.asarray(beta, dtype=float)
    vcov = np.asarray(vcov, dtype=float)
    out, warns = [], []
    for label, idx, ar in parts(spec, labels):
        s_r = float(np.sum(beta[ar]))
        if not s_r < 1:
            reason = (f"not defined: the autoregressive coefficients sum to {s_r:.4g} >= 1 "
                      "(no steady state)")
            out.append(TermEstimate(label, math.nan, math.nan, math.nan, math.nan, reason))
            warns.append(f"{label}: {reason}")
            continue
        theta = value(beta, idx, ar)
        g = gradient(beta, idx, ar)
        var = float(g @ vcov @ g)
        se = math.sqrt(var) if var > 0 else math.nan
        z = theta / se if se > 0 else math.nan
        out.append(TermEstimate(label, theta, se, z, p_normal(z)))
        ones = np.zeros(len(beta))
        ones[ar] = 1.0
        v_r = float(ones @ vcov @ ones)
        if v_r > 0 and (1.0 - s_r) < 2.0 * math.sqrt(v_r):
            warns.append(f"{label}: the autoregressive coefficients sum to {s_r:.3g}, within "
                         "two standard errors of 1; the delta-method standard error of the "
                         "long-run effect is then unreliable")
    return tuple(out), list(dict.fromkeys(warns))
