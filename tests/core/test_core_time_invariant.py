"""Time-invariant regressors (education, sector, a founding cohort) in GMM variants:
system GMM identifies them from the level equation (an exogenous one instruments
itself there, which assumes it is uncorrelated with the unit effect); difference GMM
(first differences or forward orthogonal deviations) cannot, and drops them with a
one-line warning naming them. Simulation with known truth: robustgmm.simulate's
process plus delta * z_i with z_i ~ N(0, 1) independent of the unit effect, written
as y* = y + delta z / (1 - rho), so that y*_t - rho y*_(t-1) = ... + delta z_i."""
from __future__ import annotations

import numpy as np
import pytest

from robustgmm.core import fit
from robustgmm.data import panel_from_frame
from robustgmm.simulate import PanelProcess, simulate_panel
from robustgmm.spec import Regressor, Spec

TRUE = PanelProcess(rho=0.5, beta=1.0, gamma=0.5)
DELTA = 0.8


def _panel(n=3000, t=7, seed=12):
    df = simulate_panel(n, t, TRUE, seed=seed)
    rng = np.random.default_rng(seed + 1)
    z = rng.normal(0.0, 1.0, n)
    df["z"] = np.repeat(z, t)
    df["y"] = df["y"] + DELTA * df["z"] / (1 - TRUE.rho)
    return panel_from_frame(df, "unit", "period", ["y", "x", "w", "z"])


def _spec(**kw):
    base = dict(unit="unit", period="period", outcome="y", outcome_lags=(1,),
                regressors=(Regressor("x", (0,), "endogenous"), Regressor("w", (0,), "exogenous"),
                            Regressor("z", (0,), "exogenous")),
                time_effects=False, equations="system", transform="fd", steps=2,
                form="collapsed")
    base.update(kw)
    return Spec(**base)


@pytest.mark.parametrize("transform", ["fd", "fod"])
def test_system_gmm_estimates_a_time_invariant_term_from_the_level_equation(transform):
    panel = _panel()
    res = fit(_spec(transform=transform), panel)
    t = res.term("z[t]")
    assert abs(t.estimate - DELTA) < 4 * t.std_error and abs(t.estimate - DELTA) < 0.1
    assert any("z[t]: time-invariant, identified from the level equation" in w
               for w in res.warnings)
    lr = res.term("z[long-run]")
    assert abs(lr.estimate - DELTA / (1 - TRUE.rho)) < 4 * lr.std_error
    for label, truth in (("y[t-1]", TRUE.rho), ("x[t]", TRUE.beta), ("w[t]", TRUE.gamma)):
        assert abs(res.term(label).estimate - truth) < 4 * res.term(label).std_error, label


@pytest.mark.parametrize("transform", ["fd", "fod"])
def test_difference_gmm_drops_a_time_invariant_term_with_a_note(transform):
    panel = _panel(n=1500)
    res = fit(_spec(equations="difference", transform=transform), panel)
    assert "z[t]" not in res.labels and "z[long-run]" not in [t.label for t in res.long_run]
    notes = [w for w in res.warnings if w.startswith("z[t] dropped")]
    assert len(notes) == 1 and "\n" not in notes[0]
    assert "does not vary within units" in notes[0]
    # the other terms are estimated as without z (the transform removes it exactly)
    ref = fit(_spec(equations="difference", transform=transform,
                    regressors=_spec().regressors[:2]), panel)
    np.testing.assert_allclose(res.params, ref.params, rtol=1e-10, atol=1e-12)


def test_a_regressor_collinear_otherwise_is_still_an_error():
    """Only time-invariance is dropped silently-with-a-note; a regressor repeating
    another (here z2 = 2 x) stays an estimation error naming it."""
    from robustgmm.errors import EstimationError

    df = simulate_panel(300, 6, TRUE, seed=3)
    df["x2"] = 2 * df["x"]
    panel = panel_from_frame(df, "unit", "period", ["y", "x", "w", "x2"])
    spec = _spec(equations="difference",
                 regressors=(Regressor("x", (0,), "endogenous"), Regressor("x2", (0,), "exogenous")))
    with pytest.raises(EstimationError, match="x2"):
        fit(spec, panel)
