"""Shared helpers for the estimation-core tests (not a test module)."""
from __future__ import annotations

from robustgmm.core.dense import dense_rows
from robustgmm.data import panel_from_frame
from robustgmm.simulate import PanelProcess, panel_spec, simulate_panel
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
