"""Simulated dynamic panels with a known data-generating process.

Used by the tests (simulation with known truth), the benchmark and the examples.

The process (units ``i``, periods ``t``)::

    x_it = rho_x x_i,t-1 + tau eta_i + theta eps_it + v_it          (endogenous when theta != 0)
    w_it ~ N(0, 1)                                                  (strictly exogenous)
    y_it = rho y_i,t-1 + beta x_it + gamma w_it + eta_i + eps_it

with ``eta_i ~ N(0, sigma_eta²)``, ``eps_it ~ N(0, sigma_eps²)`` (or heteroskedastic across
units when ``hetero`` > 0), ``v_it ~ N(0, 1)``. The process starts at the mean given
``eta_i`` and runs ``burn_in`` periods before the kept ones, so it is mean-stationary:
``E[Δy_it eta_i] = 0``, the condition that makes the level-equation instruments of
system GMM valid (Blundell & Bond 1998).
"""
from __future__ import annotations

from dataclasses import asdict, dataclass

import numpy as np
import pandas as pd


@dataclass(frozen=True)
class PanelProcess:
    rho: float = 0.5
    beta: float = 1.0
    gamma: float = 0.5
    rho_x: float = 0.5
    tau: float = 0.5
    theta: float = 0.4
    sigma_eta: float = 1.0
    sigma_eps: float = 1.0
    hetero: float = 0.0
    burn_in: int = 30

    def truth(self) -> dict:
        return asdict(self)


def simulate_panel(n_units: int, n_periods: int, process: PanelProcess = PanelProcess(),
                   seed: int = 0, first_period: int = 2001) -> pd.DataFrame:
    """Long frame with columns ``unit, period, y, x, w`` (one row per unit-period)."""
    rng = np.random.default_rng(seed)
    p = process
    n, total = n_units, n_periods + p.burn_in
    eta = rng.normal(0.0, p.sigma_eta, n)
    scale = p.sigma_eps * (1.0 + p.hetero * rng.uniform(0.0, 1.0, n))
    mean_x = p.tau * eta / (1.0 - p.rho_x)
    mean_y = (eta + p.beta * mean_x) / (1.0 - p.rho)
    x_prev = mean_x + rng.normal(0.0, 1.0, n)
    y_prev = mean_y + rng.normal(0.0, 1.0, n)
    ys = np.empty((n, n_periods))
    xs = np.empty((n, n_periods))
    ws = np.empty((n, n_periods))
    for t in range(total):  # a loop over periods; every step is vectorised over units
        eps = rng.normal(0.0, 1.0, n) * scale
        x = p.rho_x * x_prev + p.tau * eta + p.theta * eps + rng.normal(0.0, 1.0, n)
        w = rng.normal(0.0, 1.0, n)
        y = p.rho * y_prev + p.beta * x + p.gamma * w + eta + eps
        if t >= p.burn_in:
            k = t - p.burn_in
            ys[:, k], xs[:, k], ws[:, k] = y, x, w
        x_prev, y_prev = x, y
    return pd.DataFrame({
        "unit": np.repeat(np.arange(1, n + 1), n_periods),
        "period": np.tile(np.arange(first_period, first_period + n_periods), n),
        "y": ys.ravel(), "x": xs.ravel(), "w": ws.ravel(),
    })
