"""Checks of the OLS / within bounds (robustgmm.audit.bounds).

Sources: statsmodels OLS with ``cov_type="cluster"`` and linearmodels
``PanelOLS(entity_effects=True)`` with ``cov_type="clustered"`` (reference
libraries); Nickell (1981), Econometrica 49(6) 1417–1426, the large-N bias of the
within estimator of an AR(1) panel (formula from memory, verified here against an
exact computation and by simulation).
"""
from __future__ import annotations

import numpy as np
import pandas as pd
import pytest

from robustgmm.audit.bounds import ar_bounds, nickell_bias, ols_and_within, sum_label
from robustgmm.data import Panel
from robustgmm.spec import Regressor, Spec

statsmodels_api = pytest.importorskip("statsmodels.api")
linearmodels_panel = pytest.importorskip("linearmodels.panel")


def _panel(N=60, P=9, seed=0, missing=0.08):
    """An unbalanced AR(2) panel with a fixed effect and one regressor."""
    rng = np.random.default_rng(seed)
    eta = rng.normal(size=N)
    x = rng.normal(size=(N, P)) + 0.5 * eta[:, None]
    y = np.zeros((N, P))
    y[:, 0] = eta + rng.normal(size=N)
    y[:, 1] = 0.5 * y[:, 0] + eta + rng.normal(size=N)
    for t in range(2, P):
        y[:, t] = 0.5 * y[:, t - 1] + 0.2 * y[:, t - 2] + 0.3 * x[:, t] + eta + rng.normal(size=N)
    y[rng.random((N, P)) < missing] = np.nan  # gaps: lags become missing, never shift
    values = {"y": y, "x": x}
    return Panel(units=np.arange(N), periods=np.arange(2000, 2000 + P), values=values)


def _long(spec, panel, sample):
    """The sample as a long frame with the regressors in levels."""
    rows = {"unit": np.repeat(panel.units, panel.n_periods),
            "period": np.tile(panel.periods, panel.n_units),
            "y": panel.values["y"].ravel()}
    for var, lag, label in spec.regressor_terms():
        rows[label] = panel.lagged(var, lag).ravel()
    frame = pd.DataFrame(rows)
    return frame[sample.ravel()].reset_index(drop=True)


SPECS = {
    "ar2_time_effects": Spec(unit="unit", period="period", outcome="y", outcome_lags=(1, 2),
                             regressors=(Regressor("x", (0, 1)),), time_effects=True),
    "ar1_no_time_effects": Spec(unit="unit", period="period", outcome="y", outcome_lags=(1,),
                                regressors=(Regressor("x", (0,)),), time_effects=False),
}


@pytest.mark.parametrize("name", list(SPECS))
def test_against_statsmodels_and_linearmodels(name):
    spec = SPECS[name]
    panel = _panel()
    rng = np.random.default_rng(5)
    mask = rng.random((panel.n_units, panel.n_periods)) < 0.9  # a variant's sample
    labels, (bo, Vo), (bf, Vf), sample, _ = ols_and_within(spec, panel, mask)
    frame = _long(spec, panel, sample)
    assert len(frame) == sample.sum() > 200

    exog = frame[labels].copy()
    dummies = pd.get_dummies(frame["period"], prefix="p", drop_first=True, dtype=float)
    # pooled OLS, clusters = units (statsmodels' default small-sample correction)
    X_ols = statsmodels_api.add_constant(pd.concat([exog, dummies], axis=1)
                                         if spec.time_effects else exog)
    ref = statsmodels_api.OLS(frame["y"], X_ols).fit(
        cov_type="cluster", cov_kwds={"groups": frame["unit"].to_numpy()})
    np.testing.assert_allclose(bo, ref.params[labels].to_numpy(), rtol=1e-8, atol=1e-10)
    np.testing.assert_allclose(np.sqrt(np.diag(Vo)), ref.bse[labels].to_numpy(), rtol=1e-8)

    # within: PanelOLS with entity effects, clustered with the small-sample factors
    # G/(G-1) (groups) and (n-1)/(n-k) (debiased)
    indexed = frame.set_index(["unit", "period"])
    X_fe = pd.concat([exog, dummies], axis=1) if spec.time_effects else exog
    X_fe.index = indexed.index
    fe = linearmodels_panel.PanelOLS(indexed["y"], X_fe, entity_effects=True).fit(
        cov_type="clustered", cluster_entity=True, debiased=True, group_debias=True)
    np.testing.assert_allclose(bf, fe.params[labels].to_numpy(), rtol=1e-8, atol=1e-10)
    np.testing.assert_allclose(np.sqrt(np.diag(Vf)), fe.std_errors[labels].to_numpy(), rtol=1e-8)

    # the bounds object: each AR lag, and their sum with sqrt(1'V1) as its error
    bounds = ar_bounds(spec, panel, mask)
    for term in spec.ar_terms():
        b = bounds.term(term)
        assert b.ols == pytest.approx(ref.params[term], rel=1e-8)
        assert b.fe_std_error == pytest.approx(fe.std_errors[term], rel=1e-8)
    if len(spec.ar_terms()) > 1:
        s = bounds.term(sum_label(spec))
        ar = list(spec.ar_terms())
        cov = ref.cov_params().loc[ar, ar].to_numpy()
        assert s.ols == pytest.approx(ref.params[ar].sum(), rel=1e-8)
        assert s.ols_std_error == pytest.approx(np.sqrt(cov.sum()), rel=1e-8)
        assert bounds.persistence == sum_label(spec)
    assert bounds.observations == len(frame)
    assert bounds.units == frame["unit"].nunique()


def _exact_within_plim(rho: float, T: int) -> float:
    """plim of the within estimator from the exact second moments.

    With a stationary AR(1) deviation ``w_t = y_t − η/(1−ρ)`` (t = 0..T),
    Cov(w_s, w_t) = ρ^|s−t| / (1−ρ²). The within estimator regresses the demeaned
    y_t (t=1..T) on the demeaned y_{t−1}; both are linear maps of w, so
    plim ρ̂ = tr(M C Γ L') / tr(M L Γ L') with M = I − 11'/T, C and L the
    selection matrices of the current and lagged values.
    """
    idx = np.arange(T + 1)
    gamma = rho ** np.abs(idx[:, None] - idx[None, :]) / (1 - rho ** 2)
    C = np.eye(T + 1)[1:]
    L = np.eye(T + 1)[:-1]
    M = np.eye(T) - np.ones((T, T)) / T
    return np.trace(M @ C @ gamma @ L.T) / np.trace(M @ L @ gamma @ L.T)


@pytest.mark.parametrize("rho", [0.0, 0.3, 0.5, 0.8, 0.95])
@pytest.mark.parametrize("T", [3, 5, 10, 20])
def test_nickell_formula_matches_exact_moments(rho, T):
    # the recalled closed form (Nickell 1981) against an independent exact computation
    assert nickell_bias(rho, T) == pytest.approx(_exact_within_plim(rho, T) - rho, abs=1e-12)


@pytest.mark.parametrize("T", [5, 10])
@pytest.mark.parametrize("rho", [0.5, 0.8])
def test_within_bound_matches_nickell_on_simulated_ar1(T, rho):
    """Large N, stationary start: the within estimate is ρ + Nickell's bias within
    4 (clustered) standard errors, and OLS lies above ρ (biased up, Bond 2002)."""
    N = 20000
    rng = np.random.default_rng(100 + T)
    eta = rng.normal(size=N)
    y = np.empty((N, T + 1))
    y[:, 0] = eta / (1 - rho) + rng.normal(size=N) / np.sqrt(1 - rho ** 2)
    for t in range(1, T + 1):
        y[:, t] = rho * y[:, t - 1] + eta + rng.normal(size=N)
    panel = Panel(units=np.arange(N), periods=np.arange(T + 1), values={"y": y})
    spec = Spec(unit="u", period="p", outcome="y", outcome_lags=(1,), time_effects=False)
    mask = np.ones((N, T + 1), dtype=bool)  # period 0 drops: its lag is missing
    b = ar_bounds(spec, panel, mask).term("y[t-1]")
    expected = rho + nickell_bias(rho, T)
    assert abs(b.fe - expected) < 4 * b.fe_std_error
    assert b.fe < rho - 4 * b.fe_std_error  # the bias is real at these T
    assert b.ols > rho + 4 * b.ols_std_error
    assert b.contains(rho)


def test_gaps_never_shift_lags():
    # a missing year makes the lag missing: the cell after a gap leaves the sample
    panel = _panel(N=5, P=6, missing=0.0)
    y = panel.values["y"].copy()
    y[0, 2] = np.nan
    panel = Panel(panel.units, panel.periods, {"y": y, "x": panel.values["x"]})
    spec = SPECS["ar1_no_time_effects"]
    _, _, _, sample, _ = ols_and_within(spec, panel, np.ones(y.shape, bool))
    assert not sample[0, 2] and not sample[0, 3] and sample[0, 4]
    assert not sample[:, 0].any()


def test_time_invariant_term_dropped_from_within_only():
    """A regressor constant within units (schooling-like, effect 0.4 in the DGP) is
    absorbed by the unit effect: the within regression drops it and still gives the
    band, equal to linearmodels' PanelOLS without that term; pooled OLS keeps it and
    equals statsmodels with it (reference libraries)."""
    N, P = 80, 8
    rng = np.random.default_rng(11)
    eta = rng.normal(size=N)
    z = rng.normal(size=N) + 0.3 * eta
    x = rng.normal(size=(N, P))
    y = np.zeros((N, P))
    y[:, 0] = eta + rng.normal(size=N)
    for t in range(1, P):
        y[:, t] = 0.5 * y[:, t - 1] + 0.3 * x[:, t] + 0.4 * z + eta + rng.normal(size=N)
    panel = Panel(units=np.arange(N), periods=np.arange(2000, 2000 + P),
                  values={"y": y, "x": x, "z": np.repeat(z[:, None], P, axis=1)})
    spec = Spec(unit="unit", period="period", outcome="y", outcome_lags=(1,),
                regressors=(Regressor("x", (0,)), Regressor("z", (0,))), time_effects=True)
    mask = np.ones((N, P), bool)
    labels, (bo, Vo), (bf, Vf), sample, dropped = ols_and_within(spec, panel, mask)
    zlab = labels[-1]  # the z term's label
    assert zlab.startswith("z") and dropped == (zlab,)
    iz = labels.index(zlab)
    assert np.isnan(bf[iz]) and np.isnan(Vf[iz, iz])
    frame = _long(spec, panel, sample)
    dummies = pd.get_dummies(frame["period"], prefix="p", drop_first=True, dtype=float)
    ref = statsmodels_api.OLS(frame["y"], statsmodels_api.add_constant(
        pd.concat([frame[labels], dummies], axis=1))).fit(
        cov_type="cluster", cov_kwds={"groups": frame["unit"].to_numpy()})
    np.testing.assert_allclose(bo, ref.params[labels].to_numpy(), rtol=1e-8, atol=1e-10)
    kept = [lab for lab in labels if lab != zlab]
    indexed = frame.set_index(["unit", "period"])
    X_fe = pd.concat([frame[kept], dummies], axis=1)
    X_fe.index = indexed.index
    fe = linearmodels_panel.PanelOLS(indexed["y"], X_fe, entity_effects=True).fit(
        cov_type="clustered", cluster_entity=True, debiased=True, group_debias=True)
    ik = [labels.index(k) for k in kept]
    np.testing.assert_allclose(bf[ik], fe.params[kept].to_numpy(), rtol=1e-8, atol=1e-10)
    np.testing.assert_allclose(np.sqrt(np.diag(Vf)[ik]), fe.std_errors[kept].to_numpy(), rtol=1e-8)
    bounds = ar_bounds(spec, panel, mask)
    assert bounds.dropped == (zlab,)
    b = bounds.term(spec.ar_terms()[0])
    assert np.isfinite(b.fe) and b.fe < b.ols  # Nickell: within below OLS
