"""The stacked rows of a model as plain dense arrays.

The estimator never builds these (it sums moments over chunks of units, see
:mod:`robustgmm.core.moments`); they are the simple layout that the chunked kernels
are checked against in the tests and timed against in the benchmark: one row per
(unit, equation, period) observation, the transformed equation first and then, in
system GMM, the level equation, period by period; one column per regressor and per
instrument the fit keeps.
"""
from __future__ import annotations

import numpy as np

from .design import LEVEL, TRANSFORMED
from .problem import GMMProblem


def dense_rows(spec, panel, *, level: bool = True):
    """``(y, X, Z, unit, problem)``: the stacked rows of every unit (``unit``: the
    unit's position on the panel), built from the design's chunk of the whole panel
    with the kept columns of a fit. ``level=False`` keeps the transformed equation
    only."""
    problem = GMMProblem(spec, panel)
    d = problem.design
    ch = d.chunk(0, panel.n_units)
    ys, xs, zs, us = [], [], [], []
    for eq in (TRANSFORMED, LEVEL) if level else (TRANSFORMED,):
        for t in range(d.P):
            idx = np.flatnonzero(ch.rows[eq][:, t])
            if not idx.size:
                continue
            z = np.zeros((idx.size, d.L_all))
            for block, vals in ch.blocks:
                if block.equation == eq and block.t == t:
                    z[:, block.cols] = vals[idx]
            ys.append(ch.y[eq][idx, t])
            xs.append(ch.x[eq][idx, t][:, d.keep_x])
            zs.append(z[:, d.keep_z])
            us.append(idx)
    return (np.concatenate(ys), np.vstack(xs), np.ascontiguousarray(np.vstack(zs)),
            np.concatenate(us), problem)
