"""Instrument strength (robustgmm.core.strength): the Kleibergen-Paap rank test of
underidentification and the conditional F, checked against the formula of
Kleibergen & Paap (2006, section 3: A⊥, B⊥ from the singular value decomposition)
computed densely, against closed forms in a just-identified case, against
linearmodels' first-stage diagnostics on the equivalent stacked IV problem, and by
simulation with known truth (robustgmm.simulate)."""
from __future__ import annotations

import math
import os

import numpy as np
import pytest
from scipy import linalg, stats

from helpers_core import dense_stack, sim_panel, sim_spec
from robustgmm.core import fit, strength
from robustgmm.core.results import FitResult
from robustgmm.simulate import PanelProcess
from robustgmm.spec import Regressor

TRUE = PanelProcess(rho=0.5, beta=1.0, gamma=0.5)
#: x is i.i.d. noise declared endogenous: its lagged levels (and, in the level
#: equation, its lagged differences) are uncorrelated with it, so the model is not
#: identified (rank of E[Z'X] = K − 1): the null of the rank test holds
NULL = PanelProcess(rho=0.5, beta=1.0, gamma=0.5, rho_x=0.0, tau=0.0, theta=0.0)


def _reps(default):
    return int(os.environ.get("ROBUSTGMM_MC_REPS", default))


def _per_unit_q(spec, panel):
    """q_i = Z_i'X_i per unit (N, L, K) from the dense stacked rows."""
    y, X, Z, unit, prob = dense_stack(spec, panel)
    N = panel.n_units
    q = np.zeros((N, Z.shape[1], X.shape[1]))
    np.add.at(q, unit, Z[:, :, None] * X[:, None, :])
    return q, X, prob


def test_rank_statistic_equals_the_kleibergen_paap_formula():
    """rk(K−1) = N λ'Ω⁻¹λ with λ = (B⊥ ⊗ A⊥') vec(Θ̂), Ω = (B⊥ ⊗ A⊥') V (B⊥ ⊗ A⊥')'
    (Kleibergen & Paap 2006, section 3), A⊥ = [U12; U22] U22⁻¹ (U22 U22')^½,
    B⊥ = (V22 V22')^½ V22'⁻¹ [V12' V22'], V the unit-clustered covariance of
    vec(Θ̂): computed here densely from per-unit Z_i'X_i; equal to the chunked one.
    (The formula needs U22 invertible; the core uses the equivalent λ = U₂'Θ̂ v_K,
    which does not, so the check takes a model where U22 is well conditioned.)"""
    _, panel = sim_panel(300, 6, seed=4, process=TRUE)
    spec = sim_spec(equations="difference", form="collapsed", last_lag=4)
    res = fit(spec, panel)
    q, X, prob = _per_unit_q(spec, panel)
    N, L, K = q.shape
    G = strength._inv_sqrt(prob.zhz)
    F = strength._inv_sqrt(X.T @ X)
    theta_i = np.einsum("ab,nbc,dc->nad", G, q, F)  # G q_i F'
    theta = theta_i.mean(axis=0)
    U, s, Vt = np.linalg.svd(theta)
    V = Vt.T
    k, m, r = L, K, K - 1
    U12, U22 = U[:r, r:], U[r:, r:]
    V12, V22 = V[:r, r:], V[r:, r:]
    assert np.linalg.cond(U22) < 1e6
    A = np.vstack([U12, U22]) @ np.linalg.inv(U22) @ linalg.sqrtm(U22 @ U22.T).real
    B = linalg.sqrtm(V22 @ V22.T).real @ np.linalg.inv(V22.T) @ np.hstack([V12.T, V22.T])
    T = np.kron(B, A.T)
    vec = theta_i.transpose(0, 2, 1).reshape(N, -1)  # column-stacking vec per unit
    dev = vec - vec.mean(axis=0)
    Vcov = dev.T @ dev / N
    lam = T @ theta.T.reshape(-1)
    omega = T @ Vcov @ T.T
    rk = N * lam @ np.linalg.solve(omega, lam)
    wald = res.strength["rank_wald"]["system"]
    assert wald.df == k - m + 1
    assert wald.statistic == pytest.approx(rk, rel=1e-8)
    lm = res.strength["rank_lm"]["system"]
    assert lm.statistic == pytest.approx(rk / (1 + rk / N), rel=1e-8)
    assert lm.p_value == pytest.approx(stats.chi2.sf(lm.statistic, k - m + 1), rel=1e-8)


def test_just_identified_closed_form():
    """A pure AR(1) in difference GMM with one collapsed instrument (lag 2): L = K = 1,
    so the rank statistic is the squared t-ratio of Σ q_i, (Σq)² / Σ(q − q̄)², its LM
    form (Σq)² / Σq², and the conditional F (nothing to condition on, df 1) equals the
    LM form."""
    proc = PanelProcess(rho=0.6, beta=0.0, gamma=0.0, tau=0.0, theta=0.0)
    _, panel = sim_panel(400, 6, seed=8, process=proc)
    spec = sim_spec(equations="difference", regressors=(), form="collapsed", last_lag=2)
    res = fit(spec, panel)
    q, _, _ = _per_unit_q(spec, panel)
    q = q[:, 0, 0]
    Q = q.sum()
    assert res.strength["rank_wald"]["system"].statistic == pytest.approx(
        Q**2 / ((q - q.mean()) ** 2).sum(), rel=1e-10)
    assert res.strength["rank_lm"]["system"].statistic == pytest.approx(
        Q**2 / (q**2).sum(), rel=1e-10)
    cf = res.strength["conditional_f"]["y[t-1]"]
    assert cf.df == 1 and cf.statistic == pytest.approx(Q**2 / (q**2).sum(), rel=1e-10)


def test_against_linearmodels_first_stage():
    """One instrumented term (the lagged outcome; x and w exogenous) in difference GMM
    is a stacked cross-sectional IV problem: Δy on Δy[t-1] (endogenous), Δx, Δw
    (exogenous), excluded instruments the collapsed lagged levels, clustered by unit.
    linearmodels' first-stage diagnostics give the cluster-robust Wald test that the
    excluded instruments' coefficients are zero (chi-squared form, f.stat). With a
    persistent series (rho = 0.95, weak instruments, where the statistic matters) our
    rank Wald and our conditional F times its df agree with it within 2% (they differ
    in how the covariance is centred, which vanishes under the null)."""
    from linearmodels.iv import IV2SLS

    proc = PanelProcess(rho=0.95, beta=1.0, gamma=0.5, theta=0.0)
    _, panel = sim_panel(5000, 5, seed=3, process=proc)
    spec = sim_spec(equations="difference", form="collapsed",
                    regressors=(Regressor("x", (0,), "exogenous"),
                                Regressor("w", (0,), "exogenous")))
    res = fit(spec, panel)
    y, X, Z, unit, prob = dense_stack(spec, panel)
    labels = list(prob.design.x_labels)
    en = [labels.index("y[t-1]")]
    ex = [i for i in range(len(labels)) if i not in en]
    excl = [j for j in range(Z.shape[1])
            if not any(np.allclose(Z[:, j], X[:, i]) for i in ex)]
    assert len(excl) == Z.shape[1] - len(ex)
    lm_fit = IV2SLS(y, X[:, ex], X[:, en], Z[:, excl]).fit(cov_type="clustered", clusters=unit)
    ref = float(lm_fit.first_stage.diagnostics["f.stat"].iloc[0])
    wald = res.strength["rank_wald"]["system"]
    assert wald.df == len(excl)
    assert wald.statistic == pytest.approx(ref, rel=0.02)
    cf = res.strength["conditional_f"]["y[t-1]"]
    assert cf.statistic * cf.df == pytest.approx(ref, rel=0.02)


def test_per_equation_blocks_and_record_round_trip():
    """System GMM reports the whole system and each equation; the records keep them."""
    _, panel = sim_panel(400, 7, seed=6, process=TRUE)
    res = fit(sim_spec(equations="system", form="collapsed", time_effects=True), panel)
    assert set(res.strength["rank_lm"]) == {"system", "transformed", "level"}
    assert set(res.strength["conditional_f"]) == {"y[t-1]", "x[t]"}  # w is exogenous
    assert all(t.p_value < 1e-6 for t in res.strength["rank_lm"].values())
    back = FitResult.from_dict(res.to_dict())
    assert back.strength == res.strength
    diff = fit(sim_spec(equations="difference", form="collapsed"), panel)
    assert set(diff.strength["rank_lm"]) == {"system"}


def test_many_instruments_are_not_reported_as_valid():
    """Degrees of freedom above a tenth of the units: no p-value, a reason (rule: a
    statistic without its distribution is not reported as valid)."""
    _, panel = sim_panel(120, 8, seed=2, process=TRUE)
    res = fit(sim_spec(equations="system"), panel)  # per-period: ~60 instruments
    t = res.strength["rank_lm"]["system"]
    assert math.isnan(t.p_value) and t.reason.startswith("not valid")
    assert res.strength["conditional_f"]["x[t]"].reason.startswith("not valid")


@pytest.mark.slow
@pytest.mark.parametrize("equations", ["difference", "system"])
def test_rank_test_size_and_power_by_simulation(equations):
    """Known truth: under NULL (x not identified) the rank LM test rejects at 5% in a
    binomial band around 0.05 (3 binomial sd; collapsed instruments, N = 500, T = 7);
    with an identified x (TRUE) it rejects in more than 95% of replications, and the
    conditional F of x is below 2 on average under the null (χ²/df has mean 1) and
    above 10 under the alternative."""
    reps = _reps(200)
    spec = sim_spec(equations=equations, form="collapsed", last_lag=4)
    rej0 = rej1 = 0
    f0, f1 = [], []
    for r in range(reps):
        _, p0 = sim_panel(500, 7, seed=40_000 + r, process=NULL)
        _, p1 = sim_panel(500, 7, seed=50_000 + r, process=TRUE)
        a, b = fit(spec, p0), fit(spec, p1)
        rej0 += a.strength["rank_lm"]["system"].p_value < 0.05
        rej1 += b.strength["rank_lm"]["system"].p_value < 0.05
        f0.append(a.strength["conditional_f"]["x[t]"].statistic)
        f1.append(b.strength["conditional_f"]["x[t]"].statistic)
    band = 3 * math.sqrt(0.05 * 0.95 / reps)
    assert abs(rej0 / reps - 0.05) <= band, rej0 / reps
    assert rej1 / reps > 0.95
    assert np.mean(f0) < 2 and np.mean(f1) > 10
