"""Simulated dynamic panels with a known data-generating process.

One parametrised process serves the tests (simulation with known truth), the
benchmark and the demo and example scenarios (:mod:`robustgmm.demo`). For units
``i`` and periods ``t``::

    x_it = rho_x x_i,t-1 + tau eta_i + theta eps_it + lam eps_i,t-1 + v_it
    w_it = rho_w w_i,t-1 + u_it
    y_it = rho y_i,t-1 + beta_i x_it + gamma w_it + eta_i + eps_it

with ``eta_i ~ N(0, sigma_eta²)``, ``eps_it ~ N(0, sigma_eps² s_i²)``,
``v_it ~ N(0, sigma_v²)``, ``u_it ~ N(0, sigma_w²)``. ``x`` is endogenous when
``theta != 0`` (correlated with the current shock), predetermined when only
``lam != 0`` (correlated with the last shock, Arellano & Bond 1991), exogenous when
both are 0; ``w`` is strictly exogenous. ``beta`` may differ across units (an
array). ``s_i = 1 + hetero U_i`` makes the shocks heteroskedastic across units.

The process starts at the mean given ``eta_i`` and runs ``burn_in`` periods before
the kept ones, so it is mean-stationary: ``E[Δy_it eta_i] = 0``, the condition that
makes the level-equation instruments of system GMM valid (Blundell & Bond 1998).
Every step is vectorised over units; the loop runs over periods.
"""
from __future__ import annotations

from dataclasses import asdict, dataclass

import numpy as np
import pandas as pd


@dataclass(frozen=True)
class PanelProcess:
    """The parameters of the process above (``sigma_v``: sd of ``v``; ``rho_w`` and
    ``sigma_w``: the exogenous regressor's persistence and innovation sd)."""

    rho: float = 0.5
    beta: float = 1.0
    gamma: float = 0.5
    rho_x: float = 0.5
    tau: float = 0.5
    theta: float = 0.4
    lam: float = 0.0
    sigma_eta: float = 1.0
    sigma_eps: float = 1.0
    sigma_v: float = 1.0
    rho_w: float = 0.0
    sigma_w: float = 1.0
    hetero: float = 0.0
    burn_in: int = 30

    def truth(self) -> dict:
        return asdict(self)


def simulate_arrays(rng: np.random.Generator, n_units: int, n_periods: int,
                    process: PanelProcess, *, beta=None, heteroskedastic: bool = True,
                    draw_w_start: bool = False) -> dict[str, np.ndarray]:
    """``{"y", "x", "w"}``: (N, T) arrays of the kept periods, drawn from ``rng``.

    ``beta``: per-unit coefficients on ``x`` (default ``process.beta`` for all).
    The draws come in a fixed order (``eta``; the heteroskedasticity factors when
    ``heteroskedastic``; the start of ``x``; of ``w`` when ``draw_w_start``, else
    ``w`` starts at 0; of ``y``; then per period ``eps``, ``v``, ``u``), so a
    scenario's data are reproducible from its seed.
    """
    p, n = process, n_units
    b = p.beta if beta is None else beta
    eta = rng.normal(0.0, p.sigma_eta, n)
    scale = p.sigma_eps * (1.0 + p.hetero * rng.uniform(0.0, 1.0, n)) if heteroskedastic \
        else p.sigma_eps
    mean_x = p.tau * eta / (1.0 - p.rho_x)
    mean_y = (eta + b * mean_x) / (1.0 - p.rho)
    x = mean_x + rng.normal(0.0, 1.0, n)
    w = rng.normal(0.0, 1.0, n) if draw_w_start else np.zeros(n)
    y = mean_y + rng.normal(0.0, 1.0, n)
    eps_prev = np.zeros(n)
    out = {k: np.empty((n, n_periods)) for k in ("y", "x", "w")}
    for t in range(p.burn_in + n_periods):
        eps = rng.normal(0.0, 1.0, n) * scale
        x = (p.rho_x * x + p.tau * eta + p.theta * eps + p.lam * eps_prev
             + rng.normal(0.0, p.sigma_v, n))
        w = p.rho_w * w + rng.normal(0.0, p.sigma_w, n)
        y = p.rho * y + b * x + p.gamma * w + eta + eps
        eps_prev = eps
        if t >= p.burn_in:
            k = t - p.burn_in
            out["y"][:, k], out["x"][:, k], out["w"][:, k] = y, x, w
    return out


def simulate_panel(n_units: int, n_periods: int, process: PanelProcess = PanelProcess(),
                   seed: int = 0, first_period: int = 2001) -> pd.DataFrame:
    """Long frame with columns ``unit, period, y, x, w`` (one row per unit-period)."""
    arrays = simulate_arrays(np.random.default_rng(seed), n_units, n_periods, process)
    return long_frame(np.arange(1, n_units + 1), first_period + np.arange(n_periods),
                      arrays, unit="unit", period="period")


def panel_spec(**settings):
    """A :class:`~robustgmm.spec.Spec` for :func:`simulate_panel`'s columns: ``y`` on
    its first lag, ``x`` (endogenous) and ``w`` (exogenous) at lag 0, with period
    effects; system GMM in first differences, two-step, robust errors, per-period
    instruments from lag 2 on. ``settings`` replace any of these fields."""
    from .spec import Regressor, Spec
    base = dict(unit="unit", period="period", outcome="y", outcome_lags=(1,),
                regressors=(Regressor("x", (0,), "endogenous"), Regressor("w", (0,), "exogenous")),
                time_effects=True, equations="system", transform="fd", steps=2,
                errors="robust", first_lag=2, last_lag=None, form="per-period")
    return Spec(**{**base, **settings})


def long_frame(units, periods, arrays: dict[str, np.ndarray], *, unit: str,
               period: str) -> pd.DataFrame:
    """A long frame (unit, period, then one column per (N, T) array), sorted by unit
    then period."""
    n, t = next(iter(arrays.values())).shape
    return pd.DataFrame({unit: np.repeat(units, t), period: np.tile(periods, n),
                         **{k: v.reshape(-1) for k, v in arrays.items()}})
