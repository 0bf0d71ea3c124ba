"""Calibrate a simulated world to a long panel and draw panels from it.

The world, for units ``i`` and periods ``t`` (one regressor block ``k``)::

    y_it  = rho y_i,t-1 + sum_k b_k x_kit + eta_i + eps_it
    x_kit = r_k x_ki,t-1 + mu_ki + v_kit

``eps_it ~ N(0, s2_eps)``, ``eta_i ~ N(0, s2_eta)``; each regressor is a panel AR(1)
with its own unit effect ``mu_ki`` (correlated with ``eta_i``). An endogenous
regressor's shock ``v_kit`` is correlated with ``eps_it``, a predetermined one with
``eps_i,t-1``, an exogenous one with neither (Arellano & Bond 1991, the three
regressor kinds).

Estimation (every parameter is written with its method in ``calibration.json``):

* Truth ``rho, b_k``: the base model's coefficients (given by the caller).
* Level residuals ``u_it = y_it - rho y_i,t-1 - sum_k b_k x_kit``, transformed
  residuals ``du_it = u_it - u_i,t-1``. With serially uncorrelated ``eps``,
  ``Var(du) = 2 s2_eps``, so ``s2_eps = Var(du) / 2``; the unit mean of ``u`` has
  variance ``s2_eta + s2_eps / T_i``, so ``s2_eta = Var(mean_i u) - s2_eps mean(1/T_i)``
  (floored at 0; Arellano 2003, ch. 3, the variance-components decomposition).
* ``r_k``: Anderson & Hsiao (1981) instrumental-variable estimate, ``Δx_t`` on
  ``Δx_t-1`` instrumented by ``x_t-2`` (consistent under the AR(1) with effect).
  ``s2_v = Var(Δv)/2``, ``s2_mu`` from unit means as for ``eta``.
* Shock correlation: endogenous ``Cov(v_t, eps_t) = Cov(Δv_t, Δeps_t) / 2``;
  predetermined ``Cov(v_t, eps_t-1) = E[Δv_t Δeps_t-1]`` (the contemporaneous
  covariance being 0); exogenous 0. Effect covariance
  ``Cov(mu, eta)`` from the unit means of the level residuals.

Initial conditions: when ``|rho| < 1`` and every ``|r_k| < 1`` the process starts at
its mean given the unit effects and runs a burn-in of ``BURN_STATIONARY`` periods
(the exact stationary distribution is approached geometrically, at rate ``max(|rho|,
|r_k|)^burn``; the burn length is chosen so that factor is below 1e-6 where possible);
otherwise it starts at zero with ``BURN_LONG`` periods. ``initial="data"`` instead
keeps each unit's observed first-period deviation from its unit mean (the check of
how much system GMM relies on mean stationarity, Blundell & Bond 1998).

Every draw comes from ``numpy.random.default_rng([seed, rep])``, so a replication's
panel is rebuilt in any process from two integers and never shipped.
"""
from __future__ import annotations

from dataclasses import dataclass, field

import numpy as np
import pandas as pd

from ..options import Role

BURN_STATIONARY = 200
BURN_LONG = 500


def _wide(frame: pd.DataFrame, unit: str, period: str, col: str, units, periods):
    return (frame.pivot(index=unit, columns=period, values=col)
            .reindex(index=units, columns=periods).to_numpy(float))


def _lag(a: np.ndarray, k: int = 1) -> np.ndarray:
    out = np.full_like(a, np.nan)
    out[:, k:] = a[:, :-k]
    return out


def _var_components(u: np.ndarray) -> tuple[float, float]:
    """``(s2_shock, s2_effect)`` of ``u_it = effect_i + shock_it`` from the first
    differences and the unit means (module docstring)."""
    du = u - _lag(u)
    s2 = float(np.nanvar(du) / 2.0)
    n_i = np.sum(np.isfinite(u), axis=1)
    ok = n_i > 0
    means = np.nanmean(u[ok], axis=1)
    s2_eff = max(float(np.var(means)) - s2 * float(np.mean(1.0 / n_i[ok])), 0.0)
    return s2, s2_eff


def _nanmean_prod(a, b) -> float:
    m = np.isfinite(a) & np.isfinite(b)
    return float(np.mean(a[m] * b[m])) if m.any() else 0.0


def _anderson_hsiao(x: np.ndarray) -> float:
    """IV slope of ``Δx_t`` on ``Δx_t-1`` with instrument ``x_t-2`` (Anderson &
    Hsiao 1981)."""
    dx = x - _lag(x)
    dx1, z = _lag(dx), _lag(x, 2)
    m = np.isfinite(dx) & np.isfinite(dx1) & np.isfinite(z)
    z = z[m] - z[m].mean()
    return float(np.dot(z, dx[m]) / np.dot(z, dx1[m]))


@dataclass(frozen=True)
class World:
    """A calibrated world: parameters, the observed-cell mask and how each number was
    estimated (``methods``). ``draw(seed, rep)`` returns a long frame of the same
    units, calendar and observed cells."""

    unit: str
    period: str
    units: np.ndarray
    periods: np.ndarray
    outcome: str
    regressors: tuple[str, ...]
    kinds: tuple[str, ...]
    rho: float
    coefs: tuple[float, ...]
    s2_eps: float
    s2_eta: float
    r: tuple[float, ...]
    s2_v: tuple[float, ...]
    s2_mu: tuple[float, ...]
    cov_mu_eta: tuple[float, ...]
    cov_v_eps: tuple[float, ...]
    mask: np.ndarray = field(repr=False)
    start_dev: dict = field(repr=False, default_factory=dict)
    initial: str = "stationary"

    @property
    def stationary(self) -> bool:
        return abs(self.rho) < 1 and all(abs(r) < 1 for r in self.r)

    @property
    def burn_in(self) -> int:
        return BURN_STATIONARY if self.stationary else BURN_LONG

    def arrays(self, seed: int, rep: int, masked: bool = True) -> dict[str, np.ndarray]:
        """(N, T) arrays of one replication, drawn from ``default_rng([seed, rep])``;
        unobserved cells are NaN (``masked=False``: every cell, for callers that copy
        each column's own pattern of missing cells)."""
        rng = np.random.default_rng([int(seed), int(rep)])
        n, t_obs = self.mask.shape
        k = len(self.regressors)
        # unit effects: mu_k = g_k eta + independent part, g_k = Cov(mu_k, eta)/s2_eta
        # (positive semi-definite by construction; the independent variance is floored at 0)
        eta = rng.normal(0.0, np.sqrt(self.s2_eta), n)
        g = np.array(self.cov_mu_eta) / self.s2_eta if self.s2_eta > 0 else np.zeros(k)
        sd_mu = np.sqrt(np.maximum(np.array(self.s2_mu) - g ** 2 * self.s2_eta, 0.0))
        mu = eta[:, None] * g + rng.normal(0.0, 1.0, (n, k)) * sd_mu
        sd_eps = np.sqrt(self.s2_eps)
        # v_k = a_k eps_t + c_k eps_t-1 + independent part (kinds from the module docstring)
        a = np.array([c / self.s2_eps if kd == Role.ENDOGENOUS.value else 0.0
                      for c, kd in zip(self.cov_v_eps, self.kinds)]) if self.s2_eps > 0 else np.zeros(k)
        c = np.array([cv / self.s2_eps if kd == Role.PREDETERMINED.value else 0.0
                      for cv, kd in zip(self.cov_v_eps, self.kinds)]) if self.s2_eps > 0 else np.zeros(k)
        sd_ind = np.sqrt(np.maximum(np.array(self.s2_v) - (a ** 2 + c ** 2) * self.s2_eps, 0.0))
        r, b = np.array(self.r), np.array(self.coefs)
        if self.stationary:
            x = mu / (1.0 - r)
            y = (eta + x @ b) / (1.0 - self.rho)
        else:
            x, y = np.zeros((n, k)), np.zeros(n)
        eps_prev = np.zeros(n)
        ys, xs = np.empty((n, t_obs)), np.empty((n, t_obs, k))
        burn = self.burn_in
        for t in range(burn + t_obs):
            eps = rng.normal(0.0, sd_eps, n)
            v = eps[:, None] * a + eps_prev[:, None] * c + rng.normal(0.0, 1.0, (n, k)) * sd_ind
            x = r * x + mu + v
            y = self.rho * y + x @ b + eta + eps
            eps_prev = eps
            if t >= burn:
                ys[:, t - burn], xs[:, t - burn] = y, x
        if self.initial == "data" and self.start_dev:
            # shift each unit's path so its first period deviates from the unit
            # mean as observed; the shift decays as the process would
            dev = self.start_dev[self.outcome]
            ys += np.nan_to_num(dev)[:, None] * self.rho ** np.arange(t_obs)[None, :]
        if not masked:
            return {self.outcome: ys, **{name: xs[:, :, j] for j, name in enumerate(self.regressors)}}
        out = {self.outcome: np.where(self.mask, ys, np.nan)}
        for j, name in enumerate(self.regressors):
            out[name] = np.where(self.mask, xs[:, :, j], np.nan)
        return out

    def draw(self, seed: int, rep: int) -> pd.DataFrame:
        """Long frame ``unit, period, outcome, regressors`` of observed cells only."""
        arr = self.arrays(seed, rep)
        n, t = self.mask.shape
        frame = pd.DataFrame({self.unit: np.repeat(self.units, t),
                              self.period: np.tile(self.periods, n),
                              **{k: v.reshape(-1) for k, v in arr.items()}})
        return frame[self.mask.reshape(-1)].reset_index(drop=True)

    def to_dict(self) -> dict:
        """The parameters with how each was estimated (``calibration.json``)."""
        est = "from the data (module robustgmm.montecarlo.calibrate)"
        out = {
            "initial": self.initial,
            "initial_method": ("stationary: starts at the mean given the unit effects, "
                               f"burn-in {self.burn_in} periods" if self.stationary else
                               f"not stationary: starts at zero, long burn-in {self.burn_in} periods"),
            "units": int(self.mask.shape[0]), "periods": [int(p) for p in self.periods],
            "observed_cells": int(self.mask.sum()),
            "parameters": {
                f"L1.{self.outcome}": {"value": self.rho, "method": "truth: base model coefficient"},
                "sigma2_eps": {"value": self.s2_eps, "method": "Var(transformed residual)/2"},
                "sigma2_eta": {"value": self.s2_eta,
                               "method": "Var(unit mean of level residual) - sigma2_eps*mean(1/T_i)"},
            },
        }
        for j, name in enumerate(self.regressors):
            p = out["parameters"]
            p[name] = {"value": self.coefs[j], "method": "truth: base model coefficient"}
            p[f"{name}.ar1"] = {"value": self.r[j], "method": "Anderson-Hsiao IV (x_t-2 for dx_t-1)"}
            p[f"{name}.sigma2_v"] = {"value": self.s2_v[j], "method": "Var(differenced AR(1) residual)/2"}
            p[f"{name}.sigma2_mu"] = {"value": self.s2_mu[j], "method": "unit means net of sigma2_v/T_i"}
            p[f"{name}.cov_mu_eta"] = {"value": self.cov_mu_eta[j], "method": "unit means of level residuals"}
            p[f"{name}.cov_v_eps"] = {"value": self.cov_v_eps[j], "method": {
                Role.ENDOGENOUS.value: "Cov(dv_t, deps_t)/2 (contemporaneous)",
                Role.PREDETERMINED.value: "E[dv_t deps_t-1] (previous shock)",
            }.get(self.kinds[j], "0 (exogenous)")}
            p[f"{name}.kind"] = {"value": self.kinds[j], "method": "model file"}
        return out


def calibrate(frame: pd.DataFrame, *, unit: str, period: str, outcome: str,
              regressors: dict[str, str], truth: dict[str, float],
              initial: str = "stationary") -> World:
    """Estimate a :class:`World` from a long ``frame``.

    ``regressors``: name → kind (``options.Role`` value); ``truth``: ``L1.<outcome>``
    and each regressor name → the coefficient (the base model's or ``[simulate.truth]``).
    """
    units = np.sort(frame[unit].unique())
    periods = np.sort(frame[period].unique())
    y = _wide(frame, unit, period, outcome, units, periods)
    xs = {k: _wide(frame, unit, period, k, units, periods) for k in regressors}
    rho = float(truth[f"L1.{outcome}"])
    u = y - rho * _lag(y)
    for k, x in xs.items():
        u = u - float(truth[k]) * x
    s2_eps, s2_eta = _var_components(u)
    de = u - _lag(u)
    um = np.nanmean(np.where(np.isfinite(u), u, np.nan), axis=1) if np.isfinite(u).any() else None
    r, s2_v, s2_mu, cme, cve = [], [], [], [], []
    for k, kind in regressors.items():
        x = xs[k]
        rk = _anderson_hsiao(x)
        e = x - rk * _lag(x)
        sv, smu = _var_components(e)
        dv = e - _lag(e)
        em = np.nanmean(e, axis=1)
        ok = np.isfinite(em) & np.isfinite(um)
        # Cov(mean v_i, mean u_i) contains Cov(mu, eta) plus shock terms of order 1/T; kept as is
        cme.append(float(np.cov(em[ok], um[ok])[0, 1]))
        if kind == Role.ENDOGENOUS.value:
            cve.append(_nanmean_prod(dv, de) / 2.0)
        elif kind == Role.PREDETERMINED.value:
            cve.append(_nanmean_prod(dv, _lag(de)))
        else:
            cve.append(0.0)
        r.append(rk); s2_v.append(sv); s2_mu.append(smu)
    mask = np.isfinite(y) & np.all([np.isfinite(x) for x in xs.values()], axis=0) \
        if xs else np.isfinite(y)
    dev = {outcome: y[:, 0] - np.nanmean(y, axis=1)}
    return World(unit=unit, period=period, units=units, periods=periods, outcome=outcome,
                 regressors=tuple(regressors), kinds=tuple(regressors.values()), rho=rho,
                 coefs=tuple(float(truth[k]) for k in regressors), s2_eps=s2_eps,
                 s2_eta=s2_eta, r=tuple(r), s2_v=tuple(s2_v), s2_mu=tuple(s2_mu),
                 cov_mu_eta=tuple(cme), cov_v_eps=tuple(cve), mask=mask,
                 start_dev=dev, initial=initial)


def fit_summary(frame: pd.DataFrame, sim: pd.DataFrame, columns, *, unit: str,
                period: str) -> dict:
    """Real vs simulated: mean, variance, first-order autocorrelation (within unit)
    and missing share of each column (``calibration.json`` ``fit``)."""
    def stats(f):
        out = {}
        f = f.sort_values([unit, period])
        for c in columns:
            s = f[c]
            lag = f.groupby(unit)[c].shift(1)
            m = s.notna() & lag.notna()
            out[c] = {"mean": float(s.mean()), "variance": float(s.var()),
                      "autocorrelation": float(np.corrcoef(s[m], lag[m])[0, 1]) if m.sum() > 2 else None,
                      "missing_share": float(s.isna().mean())}
        return out
    return {"real": stats(frame), "simulated": stats(sim)}
