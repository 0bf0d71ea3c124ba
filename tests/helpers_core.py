"""Shared helpers for the estimation-core tests (not a test module)."""
from __future__ import annotations

from robustgmm.core.dense import dense_rows
from robustgmm.data import panel_from_frame
import numpy as np

from robustgmm.simulate import (PanelProcess, long_frame, panel_spec, simulate_arrays,
                               simulate_panel)
from robustgmm.spec import Spec


def sim_spec(**kw) -> Spec:
    """:func:`robustgmm.simulate.panel_spec` without period effects (unless asked)."""
    return panel_spec(**{"time_effects": False, **kw})


def sim_panel(n_units=200, n_periods=7, seed=1, process=PanelProcess(), **kw):
    df = simulate_panel(n_units, n_periods, process, seed=seed, **kw)
    return df, panel_from_frame(df, "unit", "period", ["y", "x", "w"])


def numeric_windmeijer_d(spec: Spec, panel, b1, rel_step: float):
    """The derivative of the two-step map b -> two-step estimate with the weight
    built from b, at ``b1``, by central differences (step ``rel_step (1 + |b_k|)``):
    Windmeijer's (2005) D is this derivative at the one-step estimate."""
    import numpy as np
    from robustgmm.core import GMMProblem
    prob = GMMProblem(spec, panel)
    numeric = np.zeros((len(b1), len(b1)))
    for k in range(len(b1)):
        h = rel_step * (1.0 + abs(b1[k]))
        up, down = b1.copy(), b1.copy()
        up[k] += h
        down[k] -= h
        numeric[:, k] = (prob.two_step_from(up)[0] - prob.two_step_from(down)[0]) / (2 * h)
    return numeric


def dense_stack(spec: Spec, panel):
    """The stacked rows of every unit as dense arrays (y, X, Z, unit id, problem),
    robustgmm.core.dense.dense_rows."""
    return dense_rows(spec, panel)


#: No time effects and no unit trend in the planted panels' process.
QUIET = dict(theta=0.0, tau=0.0)


def planted_frame(n=400, n_planted=5, periods=8, seed=1, beta_rest=0.0,
                  unit="unit", period="period"):
    """The dropping-units planted panel as a long frame (known truth by construction):
    ``n - n_planted`` units with effect ``beta_rest``, then the planted units (the last
    ids): effect 1, x with standard deviation 5, shocks and unit effects of sd 0.1."""
    rest = simulate_arrays(np.random.default_rng(seed), n - n_planted, periods,
                           PanelProcess(beta=beta_rest, **QUIET))
    arrays = dict(rest)
    if n_planted:
        plant = simulate_arrays(np.random.default_rng(seed + 1000), n_planted, periods,
                                PanelProcess(beta=1.0, sigma_v=5.0, rho_x=0.0, sigma_eps=0.1,
                                             sigma_eta=0.1, **QUIET))
        arrays = {k: np.vstack([rest[k], plant[k]]) for k in rest}
    return long_frame(np.arange(1, n + 1), 2001 + np.arange(periods), arrays,
                      unit=unit, period=period)
