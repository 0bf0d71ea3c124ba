"""Calibration recovers its own inputs (issue 15): simulate from a known world
(robustgmm.simulate, the project's known-truth process), calibrate on one large draw,
and recover the parameters. Tolerances: a few standard errors of each moment
estimate at N = 4000, T = 10 (sampling sd of a variance estimate ~ s2 sqrt(2/n))."""
import numpy as np
import pytest

from robustgmm.montecarlo import calibrate
from robustgmm.simulate import PanelProcess, simulate_panel


def _world(proc, n=4000, t=10, seed=3):
    df = simulate_panel(n, t, proc, seed=seed)
    w = calibrate(df, unit="unit", period="period", outcome="y",
                  regressors={"x": "endogenous", "w": "exogenous"},
                  truth={"y[t-1]": proc.rho, "x[t]": proc.beta, "w[t]": proc.gamma})
    return df, w


def test_recovers_known_world():
    proc = PanelProcess(rho=0.5, beta=1.0, gamma=0.5, rho_x=0.5, tau=0.5, theta=0.4,
                        rho_w=0.3, sigma_w=1.0, hetero=0.0)
    _, w = _world(proc)
    assert w.s2_eps == pytest.approx(1.0, abs=0.05)
    assert w.s2_eta == pytest.approx(1.0, abs=0.1)
    assert w.r[0] == pytest.approx(0.5, abs=0.05)
    assert w.r[1] == pytest.approx(0.3, abs=0.05)
    # x's shock is theta*eps + v: variance theta² + 1, covariance with eps theta
    assert w.s2_v[0] == pytest.approx(1.16, abs=0.06)
    assert w.cov_v_eps[0] == pytest.approx(0.4, abs=0.05)
    assert w.cov_v_eps[1] == 0.0
    assert w.stationary


def test_round_trip_and_pattern():
    """Calibrating on a draw of the calibrated world gives back the world's
    parameters; the draw copies the observed cells exactly; draws depend only on
    (seed, rep)."""
    proc = PanelProcess(rho=0.6, beta=0.8, gamma=0.5, rho_x=0.4, tau=0.3, theta=0.3,
                        rho_w=0.2, hetero=0.0)
    df, w = _world(proc)
    df = df.drop(index=df.index[::7]).reset_index(drop=True)  # gaps
    w = calibrate(df, unit="unit", period="period", outcome="y",
                  regressors={"x": "endogenous", "w": "exogenous"},
                  truth={"y[t-1]": proc.rho, "x[t]": proc.beta, "w[t]": proc.gamma})
    sim = w.draw(11, 0)
    assert len(sim) == len(df)
    assert (sim[["unit", "period"]].to_numpy() == df[["unit", "period"]].to_numpy()).all()
    assert sim.equals(w.draw(11, 0)) and not sim.equals(w.draw(11, 1))
    w2 = calibrate(sim, unit="unit", period="period", outcome="y",
                   regressors={"x": "endogenous", "w": "exogenous"},
                   truth={"y[t-1]": proc.rho, "x[t]": proc.beta, "w[t]": proc.gamma})
    assert w2.s2_eps == pytest.approx(w.s2_eps, rel=0.06)
    assert w2.s2_eta == pytest.approx(w.s2_eta, abs=0.12)
    assert np.allclose(w2.r, w.r, atol=0.06)
    assert w2.cov_v_eps[0] == pytest.approx(w.cov_v_eps[0], abs=0.06)
    d = w.to_dict()
    assert d["parameters"]["sigma2_eps"]["method"].startswith("Var(")
