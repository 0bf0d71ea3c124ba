"""Shared helpers for the estimation-core tests (not a test module)."""
from __future__ import annotations

import numpy as np
import pandas as pd

from robustgmm.core.design import LEVEL, TRANSFORMED, Design
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
    """The stacked rows of every unit as dense arrays (y, X, Z, unit id), built from
    the design's chunk for the whole panel with the kept columns of a fit."""
    from robustgmm.core import GMMProblem
    prob = GMMProblem(spec, panel)
    d = prob.design
    ch = d.chunk(0, panel.n_units)
    rows_y, rows_x, rows_z, rows_u = [], [], [], []
    for eq in (TRANSFORMED, LEVEL):
        for t in range(d.P):
            present = ch.rows[eq][:, t]
            if not present.any():
                continue
            z = np.zeros((ch.n, d.L_all))
            for block, vals in ch.blocks:
                if block.equation == eq and block.t == t:
                    z[:, block.cols] = vals
            idx = np.flatnonzero(present)
            rows_y.append(ch.y[eq][idx, t])
            rows_x.append(ch.x[eq][idx, t][:, d.keep_x])
            rows_z.append(z[idx][:, d.keep_z])
            rows_u.append(idx)
    return (np.concatenate(rows_y), np.vstack(rows_x), np.vstack(rows_z),
            np.concatenate(rows_u), prob)
