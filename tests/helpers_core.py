"""Shared helpers for the estimation-core tests (not a test module)."""
from __future__ import annotations

from robustgmm.core.dense import dense_rows
from robustgmm.data import panel_from_frame
from robustgmm.simulate import PanelProcess, simulate_panel
from robustgmm.spec import Regressor, Spec


def sim_spec(**kw) -> Spec:
    base = dict(unit="unit", period="period", outcome="y", outcome_lags=(1,),
                regressors=(Regressor("x", (0,), "endogenous"), Regressor("w", (0,), "exogenous")),
                time_effects=False, equations="system", transform="fd", steps=2,
                errors="robust", first_lag=2, last_lag=None, form="per-period")
    base.update(kw)
    return Spec(**base)


def sim_panel(n_units=200, n_periods=7, seed=1, process=PanelProcess(), **kw):
    df = simulate_panel(n_units, n_periods, process, seed=seed, **kw)
    return df, panel_from_frame(df, "unit", "period", ["y", "x", "w"])


def dense_stack(spec: Spec, panel):
    """The stacked rows of every unit as dense arrays (y, X, Z, unit id, problem),
    robustgmm.core.dense.dense_rows."""
    return dense_rows(spec, panel)
