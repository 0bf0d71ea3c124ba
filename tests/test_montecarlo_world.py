"""The calibrated world carries every term of the model, time effects and (optionally)
the data's heteroskedasticity across units (issue 15). Known truth throughout: the
data come from robustgmm.simulate or from a World with given parameters; tolerances
are a few sampling standard errors of each estimate at the stated N and T."""
import numpy as np
import pytest

from robustgmm import core, data
from robustgmm.modelfile import spec_from_dict
from robustgmm.montecarlo import calibrate
from robustgmm.montecarlo.calibrate import recalibrate
from robustgmm.simulate import PanelProcess, simulate_panel

PROC = PanelProcess(rho=0.5, beta=1.0, gamma=0.5, rho_x=0.5, tau=0.5, theta=0.4,
                    rho_w=0.3, sigma_w=1.0, hetero=0.0)
REGS = {"x": "endogenous", "w": "exogenous"}
TRUTH = {"y[t-1]": PROC.rho, "x[t]": PROC.beta, "w[t]": PROC.gamma}


def _with_time_effects(df, dy, dx):
    """Add known period effects to the outcome and to x (x's effect also moves y
    through beta and, through the lag, every later period)."""
    df = df.copy()
    periods = np.sort(df["period"].unique())
    jx = dict(zip(periods, dx))
    # x_t = r x_t-1 + tau_t + ...: the added path s_t = r s_t-1 + dx_t; y likewise
    sx, sy, prev_x, prev_y = {}, {}, 0.0, 0.0
    for p, ey in zip(periods, dy):
        prev_x = PROC.rho_x * prev_x + jx[p]
        prev_y = PROC.rho * prev_y + PROC.beta * prev_x + ey
        sx[p], sy[p] = prev_x, prev_y
    df["x"] = df["x"] + df["period"].map(sx)
    df["y"] = df["y"] + df["period"].map(sy)
    return df


def test_time_effects_recovered_and_kept_out_of_the_variances():
    """Period effects added to y and x (N = 4000, T = 10): the calibrated effects
    match the added ones up to a constant (the intercept; the SE of a period mean
    of 4000 residuals is about 0.03), the variances are those of the world without
    them, and the world's draw reproduces each period's mean of the data."""
    dy = np.array([0, 2, -1, 3, 0, 1, 2, -2, 0, 1], float)
    dx = np.array([0, 1, 1, -1, 2, 0, 0, 1, -1, 0], float)
    df = _with_time_effects(simulate_panel(4000, 10, PROC, seed=4), dy, dx)
    w = calibrate(df, unit="unit", period="period", outcome="y", regressors=REGS, truth=TRUTH)
    delta = np.array(w.delta)
    # the first period's residual uses the lag, missing in period 1: compare from period 2
    assert np.allclose(delta[1:] - delta[1:].mean(), dy[1:] - dy[1:].mean(), atol=0.12)
    tau_x = np.array(w.tau[0])
    assert np.allclose(tau_x[1:] - tau_x[1:].mean(), dx[1:] - dx[1:].mean(), atol=0.12)
    assert w.r[0] == pytest.approx(PROC.rho_x, abs=0.05)
    assert w.s2_eps == pytest.approx(1.0, abs=0.05)
    assert w.s2_v[0] == pytest.approx(1.16, abs=0.06)
    sim = w.draw(7, 0)
    real_m = df.groupby("period")[["y", "x"]].mean()
    sim_m = sim.groupby("period")[["y", "x"]].mean()
    # period means move with the added effects (spread of dy about 1.5); allow 0.25
    assert np.allclose(sim_m["x"].to_numpy(), real_m["x"].to_numpy(), atol=0.25)
    assert np.allclose(sim_m["y"].to_numpy()[2:], real_m["y"].to_numpy()[2:], atol=0.5)
    # without time effects in the model the world has one intercept per variable
    w0 = calibrate(df, unit="unit", period="period", outcome="y", regressors=REGS,
                   truth=TRUTH, time_effects=False)
    assert len(set(w0.delta)) == 1 and len(set(w0.tau[0])) == 1


def test_heteroskedasticity_across_units_copied_with_shrinkage():
    """Shocks with sd (1 + U_i), U ~ U(0, 1) (robustgmm.simulate, hetero = 1), N = 4000,
    T = 10: the variance multipliers correlate with the true (1 + U_i)² and their spread
    is that of the true multipliers normalised to mean 1 (sd 0.39 by the uniform's
    moments; the shrinkage removes the noise of 9 differences per unit); a
    homoskedastic panel gets nearly no spread (the shrinkage removes the noise)."""
    proc = PanelProcess(**{**PROC.__dict__, "hetero": 1.0})
    rng = np.random.default_rng(5)
    # the factors simulate_arrays draws (its order: eta, then the uniforms)
    rng.normal(0.0, proc.sigma_eta, 4000)
    true = (1.0 + rng.uniform(0.0, 1.0, 4000)) ** 2
    df = simulate_panel(4000, 10, proc, seed=5)
    w = calibrate(df, unit="unit", period="period", outcome="y", regressors=REGS, truth=TRUTH,
                  heteroskedastic=True)
    h = w.unit_scale
    assert np.mean(h) == pytest.approx(1.0, abs=0.01)
    # expected correlation sqrt(signal share of the raw spread) = 0.51 here
    assert np.corrcoef(h, true)[0, 1] > 0.4
    assert np.std(h) == pytest.approx(np.std(true / true.mean()), abs=0.08)
    # a draw of that world has the same spread when calibrated again
    again = recalibrate(w, w.draw(3, 0))
    assert np.std(again.unit_scale) == pytest.approx(np.std(h), abs=0.08)
    flat = calibrate(simulate_panel(4000, 10, PROC, seed=6), unit="unit", period="period",
                     outcome="y", regressors=REGS, truth=TRUTH, heteroskedastic=True)
    # the spread estimate's sampling SD is about 0.01 here (seeds 6-11: 0 to 0.013)
    assert np.var(flat.unit_scale) < 0.03
    assert w.to_dict()["heteroskedastic"]
    entry = flat.to_dict(simulated=again)["parameters"]["unit_heteroskedasticity"]
    assert entry["method"].startswith("per unit") and "simulated" in entry


def _fit_spec(tmp_path, frame, lags_x, lags_w, outcome_lags):
    frame.to_csv(tmp_path / "draw.csv", index=False)
    return spec_from_dict({
        "data": {"file": "draw.csv", "unit": "unit", "period": "period"},
        "model": {"outcome": "y", "outcome_lags": list(outcome_lags),
                  "regressors": [{"name": "x", "lags": list(lags_x), "role": "endogenous"},
                                 {"name": "w", "lags": list(lags_w), "role": "exogenous"}]},
        "method": {"equations": "difference", "steps": 2},
        "instruments": {"form": "collapsed", "last_lag": 4}}, base_dir=tmp_path)


def test_world_with_lagged_regressor_and_second_lag_is_recovered(tmp_path):
    """A world whose truth has a second outcome lag and lagged regressors
    (y[t-2] = 0.2, x[t-1] = -0.4, w[t-1] = 0.3 besides the current terms), drawn at
    N = 5000, T = 10: two-step difference GMM with collapsed instruments (consistent
    for every term, Arellano & Bond 1991) recovers each true coefficient within 4
    Windmeijer standard errors, so the draw contains those terms."""
    truth = {"y[t-1]": 0.4, "y[t-2]": 0.2, "x[t]": 1.0, "x[t-1]": -0.4, "w[t]": 0.5,
             "w[t-1]": 0.3}
    base = simulate_panel(5000, 10, PROC, seed=8)
    w = calibrate(base, unit="unit", period="period", outcome="y", regressors=REGS,
                  truth=truth, outcome_lags=(1, 2), lags={"x": (0, 1), "w": (0, 1)})
    assert w.truth() == truth and w.stationary
    spec = _fit_spec(tmp_path, w.draw(1, 0), (0, 1), (0, 1), (1, 2))
    fit = core.fit(spec, data.load_panel(spec))
    for label, value in truth.items():
        t = fit.term(label)
        assert abs(t.estimate - value) < 4 * t.std_error, (label, t.estimate, t.std_error)
    # the world is recalibrated from its own draw: the shock variances come back
    again = recalibrate(w, w.draw(2, 0))
    assert again.s2_eps == pytest.approx(w.s2_eps, rel=0.06)
