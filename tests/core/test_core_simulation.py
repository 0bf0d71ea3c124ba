"""Simulation with known truth (see robustgmm.simulate for the process)."""
from __future__ import annotations

import dataclasses
import os

import numpy as np
import pytest

from helpers_core import sim_panel, sim_spec
from robustgmm.core import fit
from robustgmm.simulate import PanelProcess

TRUE = PanelProcess(rho=0.5, beta=1.0, gamma=0.5)


def _reps(default):
    return int(os.environ.get("ROBUSTGMM_MC_REPS", default))


@pytest.mark.parametrize("equations", ["difference", "system"])
@pytest.mark.parametrize("transform", ["fd", "fod"])
def test_large_n_recovers_parameters(equations, transform):
    """N = 4,000, T = 7, one endogenous and one exogenous regressor: two-step GMM is
    consistent for N → ∞ (Arellano & Bond 1991; Blundell & Bond 1998), so every
    coefficient lies within 4 standard errors and 0.08 of the truth."""
    _, panel = sim_panel(4000, 7, seed=42, process=TRUE)
    res = fit(sim_spec(equations=equations, transform=transform, form="collapsed"), panel)
    for label, truth in [("y[t-1]", TRUE.rho), ("x[t]", TRUE.beta), ("w[t]", TRUE.gamma)]:
        t = res.term(label)
        assert abs(t.estimate - truth) < max(4 * t.std_error, 1e-9), label
        assert abs(t.estimate - truth) < 0.08, label


@pytest.mark.slow
def test_persistent_series_difference_gmm_weak_system_not():
    """Blundell & Bond (1998), Table 2 pattern (their numbers are not restated here):
    for a pure AR(1) with rho = 0.9, T = 4, N = 200 and var(eta) = var(eps), difference
    GMM is biased towards zero, system GMM far less."""
    reps = _reps(150)
    proc = PanelProcess(rho=0.9, beta=0.0, gamma=0.0, tau=0.0, theta=0.0)
    spec = sim_spec(regressors=(), steps=1, form="per-period")
    diff, sys_ = [], []
    for r in range(reps):
        _, panel = sim_panel(200, 4, seed=500 + r, process=proc)
        diff.append(fit(dataclasses.replace(spec, equations="difference"), panel).term("y[t-1]").estimate)
        sys_.append(fit(dataclasses.replace(spec, equations="system"), panel).term("y[t-1]").estimate)
    bias_d, bias_s = np.mean(diff) - 0.9, np.mean(sys_) - 0.9
    assert bias_d < -0.15            # difference GMM collapses towards zero
    assert abs(bias_s) < 0.1         # system GMM stays close
    assert abs(bias_s) < abs(bias_d) / 3


@pytest.mark.slow
def test_hansen_and_ar2_have_nominal_size():
    """Under valid instruments (Hansen 1982; Sargan 1958) J is chi-squared with
    instruments − parameters degrees of freedom, and the AR(2) statistic is standard
    normal (Arellano & Bond 1991). Rejection rates at 5% must lie in a binomial band
    around 0.05 (collapsed instruments keep the Hansen test well behaved, Roodman 2009)."""
    reps = _reps(200)
    spec = sim_spec(equations="system", steps=2, form="collapsed", last_lag=4)
    rej_j = rej_ar2 = 0
    for r in range(reps):
        _, panel = sim_panel(300, 7, seed=9000 + r, process=TRUE)
        res = fit(spec, panel)
        rej_j += res.tests["hansen"].p_value < 0.05
        rej_ar2 += res.tests["ar2"].p_value < 0.05
    band = 3 * np.sqrt(0.05 * 0.95 / reps)
    for rate in (rej_j / reps, rej_ar2 / reps):
        assert 0.05 - band <= rate <= 0.05 + band, rate
