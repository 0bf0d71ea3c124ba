"""Calibrate a simulated world to a long panel and draw panels from it.

The world, for units ``i``, periods ``t`` and regressors ``k``, contains every term of
the base model::

    y_it  = sum_l rho_l y_i,t-l + sum_k sum_m b_km x_ki,t-m + delta_t + eta_i + eps_it
    x_kit = r_k x_ki,t-1 + tau_kt + mu_ki + v_kit

(``l`` over the model's outcome lags, ``m`` over each regressor's lags, lag 0 the
current value). ``eps_it ~ N(0, s2_eps h_i)``, ``eta_i ~ N(0, s2_eta)``; ``h_i = 1``
unless the world copies the data's heteroskedasticity across units. Each regressor is
a panel AR(1) with its own time effects ``tau_kt`` and unit effect ``mu_ki``
(correlated with ``eta_i``). An endogenous regressor's shock ``v_kit`` is correlated
with ``eps_it``, a predetermined one with ``eps_i,t-1``, an exogenous one with neither
(Arellano & Bond 1991, the three regressor kinds).

Estimation (every parameter is written with its method in ``calibration.json``):

* Truth ``rho_l, b_km``: the base model's coefficients (given by the caller).
* Level residuals ``u_it = y_it - sum_l rho_l y_i,t-l - sum_km b_km x_ki,t-m``.
  Time effects ``delta_t``: the period means of ``u`` (they hold the intercept; one
  mean over all cells when the model has no time effects). With ``w = u - delta``
  and serially uncorrelated ``eps``, ``Var(Δw) = 2 s2_eps``, so
  ``s2_eps = Var(Δw) / 2``; the unit mean of ``w`` has variance
  ``s2_eta + s2_eps / T_i``, so ``s2_eta = Var(mean_i w) - s2_eps mean(1/T_i)``
  (floored at 0; Arellano 2003, ch. 3, the variance-components decomposition).
* ``r_k``: Anderson & Hsiao (1981) instrumental-variable estimate, ``Δx_t`` on
  ``Δx_t-1`` instrumented by ``x_t-2``, with period effects (the instrument demeaned
  within each period, Frisch–Waugh); consistent under the AR(1) with effects.
  ``tau_kt``: period means of ``e = x_t - r_k x_t-1``; ``s2_v = Var(Δ(e - tau))/2``,
  ``s2_mu`` from unit means as for ``eta``.
* Shock correlation: endogenous ``Cov(v_t, eps_t) = Cov(Δv_t, Δeps_t) / 2``;
  predetermined ``Cov(v_t, eps_t-1) = E[Δv_t Δeps_t-1]`` (the contemporaneous
  covariance being 0); exogenous 0. Effect covariance ``Cov(mu, eta)`` from the unit
  means of the residuals.
* Heteroskedasticity across units (optional): ``h_i`` is unit ``i``'s mean of
  ``(Δw_it)² / (2 s2_eps)``, shrunk towards 1 by the share of its cross-unit variance
  that is sampling noise (linear empirical-Bayes shrinkage, Morris 1983): under normal
  shocks with ``m_i`` differences the noise variance of ``h_i`` is
  ``h_i² (3 m_i - 1)/m_i²`` (``E[Δ⁴] = 12 s2²``, neighbouring squares covary by
  ``2 s2²``). The shrinkage factor is ``sqrt(V / Var(h_i))``, ``V`` the variance of the
  true multipliers, so the simulated units have the spread ``V`` (the constrained
  Bayes estimator of Louis 1984; posterior means would understate it). Without the
  shrinkage a short panel would look far more heteroskedastic than it is.

Initial conditions: when the outcome's autoregression is stable (every root of
``1 - sum_l rho_l z^l`` outside the unit circle) and every ``|r_k| < 1``, the process
starts at its mean given the unit effects and the mean time effects and runs a burn-in
of ``BURN_STATIONARY`` periods (the exact stationary distribution is approached
geometrically); otherwise it starts at zero with ``BURN_LONG`` periods. The burn-in
uses the mean time effects; the observed periods use the estimated ones, which are
common to all units, so the deviations from each period's mean stay mean-stationary.
``initial="data"`` instead adds each unit's observed first-period deviation of the
outcome from its unit mean, propagated by the autoregression (the check of how much
system GMM relies on mean stationarity, Blundell & Bond 1998).

Every draw comes from ``numpy.random.default_rng([seed, rep])``, so a replication's
panel is rebuilt in any process from two integers and never shipped.
"""
from __future__ import annotations

from collections import deque
from dataclasses import dataclass, field

import numpy as np
import pandas as pd

from ..options import Role
from ..spec import term_label

BURN_STATIONARY = 200
BURN_LONG = 500
#: Smallest variance multiplier of a unit (a unit whose shocks look constant).
MIN_UNIT_SCALE = 1e-3


def _wide(frame: pd.DataFrame, unit: str, period: str, col: str, units, periods):
    return (frame.pivot(index=unit, columns=period, values=col)
            .reindex(index=units, columns=periods).to_numpy(float))


def _lag(a: np.ndarray, k: int = 1) -> np.ndarray:
    out = np.full_like(a, np.nan)
    if k == 0:
        return a.copy()
    out[:, k:] = a[:, :-k]
    return out


def _period_means(a: np.ndarray, by_period: bool) -> np.ndarray:
    """Per-period means of the finite cells of ``a`` (one overall mean repeated when
    not ``by_period``; NaN for a period without cells, such as the first period of a
    residual that needs a lag)."""
    fin = np.isfinite(a)
    if not fin.any():
        return np.zeros(a.shape[1])
    if not by_period:
        return np.full(a.shape[1], float(np.mean(a[fin])))
    cnt = fin.sum(axis=0)
    tot = np.where(fin, a, 0.0).sum(axis=0)
    return np.where(cnt > 0, tot / np.maximum(cnt, 1), np.nan)


def _first_mean(a: np.ndarray) -> float | None:
    """Mean of the first calendar period with an observed cell of ``a``."""
    for j in range(a.shape[1]):
        col = a[:, j]
        if np.isfinite(col).any():
            return float(np.nanmean(col))
    return None


def _var_components(u: np.ndarray) -> tuple[float, float]:
    """``(s2_shock, s2_effect)`` of ``u_it = effect_i + shock_it`` from the first
    differences and the unit means (module docstring)."""
    du = u - _lag(u)
    s2 = float(np.nanvar(du) / 2.0) if np.isfinite(du).any() else 0.0
    n_i = np.sum(np.isfinite(u), axis=1)
    ok = n_i > 0
    means = np.nanmean(u[ok], axis=1)
    s2_eff = max(float(np.var(means)) - s2 * float(np.mean(1.0 / n_i[ok])), 0.0)
    return s2, s2_eff


def _unit_scale(w: np.ndarray, s2: float) -> tuple[np.ndarray, float]:
    """Variance multipliers ``h_i`` of the shocks and the shrinkage weight used
    (module docstring): raw ``mean_t (Δw_it)² / (2 s2)``, then
    ``1 + sqrt(lam) (raw - 1)`` with ``lam = V / Var(raw)``, ``V = max(0, (Var(raw) - n) /
    (1 + n))`` the spread of the true multipliers (the noise ``n h_i²`` of unit
    ``i``'s estimate averages ``n (1 + V)``; ``n`` the mean of ``(3 m_i - 1)/m_i²``);
    normalised to a cell-weighted mean of 1 so that ``s2_eps`` is kept."""
    dw = w - _lag(w)
    m = np.sum(np.isfinite(dw), axis=1)
    h = np.ones(w.shape[0])
    ok = m > 0
    if s2 <= 0 or ok.sum() < 2:
        return h, 0.0
    raw = np.nanmean(dw[ok] ** 2, axis=1) / (2.0 * s2)
    noise = float(np.mean((3.0 * m[ok] - 1.0) / m[ok] ** 2))
    total = float(np.var(raw))
    # Var(raw) = V + noise E[h²] = V + noise (1 + V): the spread of the true h_i
    spread = max(0.0, (total - noise) / (1.0 + noise))
    lam = spread / total if total > 0 else 0.0
    # sqrt(lam), not lam: the simulated units need the spread V of the true
    # multipliers, which posterior means (lam) would understate (Louis 1984)
    h[ok] = np.maximum(1.0 + np.sqrt(lam) * (raw - 1.0), MIN_UNIT_SCALE)
    h /= float(np.sum(h[ok] * m[ok]) / np.sum(m[ok]))
    return h, lam


def _nanmean_prod(a, b) -> float:
    m = np.isfinite(a) & np.isfinite(b)
    return float(np.mean(a[m] * b[m])) if m.any() else 0.0


def _demean_columns(a: np.ndarray, m: np.ndarray, by_period: bool) -> np.ndarray:
    """``a`` minus its mean over the cells ``m`` (per period when ``by_period``);
    cells outside ``m`` are 0."""
    x = np.where(m, a, 0.0)
    if by_period:
        cnt = m.sum(axis=0)
        mean = x.sum(axis=0) / np.maximum(cnt, 1)
        return np.where(m, a - mean[None, :], 0.0)
    return np.where(m, a - x.sum() / max(m.sum(), 1), 0.0)


def _anderson_hsiao(x: np.ndarray, by_period: bool = True) -> float:
    """IV slope of ``Δx_t`` on ``Δx_t-1`` with instrument ``x_t-2`` (Anderson &
    Hsiao 1981), with period effects (``by_period``) or an intercept: the instrument
    demeaned within each period (or overall), which projects the effects out."""
    dx = x - _lag(x)
    dx1, z = _lag(dx), _lag(x, 2)
    m = np.isfinite(dx) & np.isfinite(dx1) & np.isfinite(z)
    if not m.any():
        return 0.0
    zt = _demean_columns(z, m, by_period)
    den = float(np.sum(zt * np.where(m, dx1, 0.0)))
    return float(np.sum(zt * np.where(m, dx, 0.0)) / den) if den != 0 else 0.0


def _stable(ar: tuple[tuple[int, float], ...]) -> bool:
    """Every root of ``1 - sum_l rho_l z^l`` outside the unit circle (the spectral
    radius of the companion matrix below 1)."""
    if not ar:
        return True
    p = max(lag for lag, _ in ar)
    comp = np.zeros((p, p))
    for lag, value in ar:
        comp[0, lag - 1] += value
    comp[1:, :-1] = np.eye(p - 1)
    return bool(np.max(np.abs(np.linalg.eigvals(comp))) < 1.0)


@dataclass(frozen=True)
class World:
    """A calibrated world: parameters, the observed-cell mask and how each number was
    estimated (``to_dict``). ``draw(seed, rep)`` returns a long frame of the same
    units, calendar and observed cells.

    ``ar``: (lag, rho_l) of the outcome; ``betas``: per regressor its (lag, b_km);
    ``delta``: the outcome's time effects per period, ``tau``: each regressor's;
    ``unit_scale``: ``h_i`` per unit (None: homoskedastic)."""

    unit: str
    period: str
    units: np.ndarray
    periods: np.ndarray
    outcome: str
    regressors: tuple[str, ...]
    kinds: tuple[str, ...]
    ar: tuple[tuple[int, float], ...]
    betas: tuple[tuple[tuple[int, float], ...], ...]
    s2_eps: float
    s2_eta: float
    r: tuple[float, ...]
    s2_v: tuple[float, ...]
    s2_mu: tuple[float, ...]
    cov_mu_eta: tuple[float, ...]
    cov_v_eps: tuple[float, ...]
    delta: tuple[float, ...]
    tau: tuple[tuple[float, ...], ...]
    delta_burn: float
    tau_burn: tuple[float, ...]
    mask: np.ndarray = field(repr=False)
    time_effects: bool = True
    unit_scale: np.ndarray | None = field(default=None, repr=False)
    shrinkage: float | None = None
    start_dev: dict = field(repr=False, default_factory=dict)
    initial: str = "stationary"

    @property
    def rho(self) -> float:
        """The coefficient of the first outcome lag (0 when the model has none)."""
        return float(sum(v for lag, v in self.ar if lag == 1))

    @property
    def stationary(self) -> bool:
        return _stable(self.ar) and all(abs(r) < 1 for r in self.r)

    @property
    def burn_in(self) -> int:
        return BURN_STATIONARY if self.stationary else BURN_LONG

    def truth(self) -> dict[str, float]:
        """Term label → its coefficient in this world."""
        out = {term_label(self.outcome, lag): v for lag, v in self.ar}
        for name, terms in zip(self.regressors, self.betas):
            out.update({term_label(name, lag): v for lag, v in terms})
        return out

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
        sd_eps = np.sqrt(self.s2_eps) * (1.0 if self.unit_scale is None
                                         else np.sqrt(self.unit_scale))
        # v_k = a_k eps_t + c_k eps_t-1 + independent part (kinds from the module
        # docstring); with unit scales, a_k and c_k are read at the average unit
        def load(kind):
            if self.s2_eps <= 0:
                return np.zeros(k)
            return np.array([cv / self.s2_eps if kd == kind else 0.0
                             for cv, kd in zip(self.cov_v_eps, self.kinds)])
        a, c = load(Role.ENDOGENOUS.value), load(Role.PREDETERMINED.value)
        sd_ind = np.sqrt(np.maximum(np.array(self.s2_v) - (a ** 2 + c ** 2) * self.s2_eps, 0.0))
        r = np.array(self.r)
        delta = np.asarray(self.delta, float)
        tau = np.asarray(self.tau, float).reshape(k, t_obs).T  # (T, k)
        d_bar, t_bar = self.delta_burn, np.asarray(self.tau_burn, float)
        p = max([lag for lag, _ in self.ar] or [0])
        q = max([lag for terms in self.betas for lag, _ in terms] or [0])
        # each regressor's lags as one (lag, column, coefficient) list
        xterms = [(lag, j, v) for j, terms in enumerate(self.betas) for lag, v in terms]
        if self.stationary:
            x = (mu + t_bar) / (1.0 - r)
            y = (eta + d_bar + sum(v * x[:, j] for _, j, v in xterms)) \
                / (1.0 - sum(v for _, v in self.ar))
        else:
            x, y = np.zeros((n, k)), np.zeros(n)
        x_hist = deque([x] * (q + 1), maxlen=q + 1)  # x_hist[m] = x_t-m after the push
        y_hist = deque([y] * max(p, 1), maxlen=max(p, 1))  # y_hist[l-1] = y_t-l
        eps_prev = np.zeros(n)
        ys, xs = np.empty((n, t_obs)), np.empty((n, t_obs, k))
        burn = self.burn_in
        for t in range(burn + t_obs):
            j_obs = t - burn
            d_t, tau_t = (delta[j_obs], tau[j_obs]) if j_obs >= 0 else (d_bar, t_bar)
            eps = rng.normal(0.0, 1.0, n) * sd_eps
            v = eps[:, None] * a + eps_prev[:, None] * c + rng.normal(0.0, 1.0, (n, k)) * sd_ind
            x = r * x + mu + tau_t + v
            x_hist.appendleft(x)
            y = (sum(val * y_hist[lag - 1] for lag, val in self.ar)
                 + sum(val * x_hist[lag][:, j] for lag, j, val in xterms)
                 + eta + d_t + eps)
            y_hist.appendleft(y)
            eps_prev = eps
            if j_obs >= 0:
                ys[:, j_obs], xs[:, j_obs] = y, x
        if self.initial == "data" and self.start_dev:
            # each unit's first period deviates from its unit mean as observed; the
            # shift then follows the autoregression (an impulse response)
            resp = np.zeros(t_obs)
            resp[0] = 1.0
            for t in range(1, t_obs):
                resp[t] = sum(val * resp[t - lag] for lag, val in self.ar if t - lag >= 0)
            ys += np.nan_to_num(self.start_dev[self.outcome])[:, None] * resp[None, :]
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

    def fingerprint(self) -> bytes:
        """The arrays a replication depends on besides :meth:`to_dict` (the mask and
        the unit scales), as bytes for a cache key."""
        out = np.packbits(self.mask).tobytes()
        if self.unit_scale is not None:
            out += np.ascontiguousarray(self.unit_scale, float).tobytes()
        return out

    def to_dict(self, simulated: "World | None" = None) -> dict:
        """The parameters with how each was estimated (``calibration.json``).
        ``simulated``: the same calibration run on a simulated panel; its value of
        every parameter is written beside the real one (the parameter-level fit)."""
        te = "period means" if self.time_effects else "one mean over all cells (no time effects)"
        scale = self.unit_scale
        params: dict[str, dict] = {}

        def put(name, value, method, get):
            entry = {"value": value, "method": method}
            if simulated is not None:
                entry["simulated"] = get(simulated)
            params[name] = entry

        truth = self.truth()
        for label, value in truth.items():
            put(label, value, "truth: base model coefficient (or [simulate.truth])",
                lambda w, lb=label: w.truth().get(lb))
        put("sigma2_eps", self.s2_eps, "Var(transformed residual net of time effects)/2",
            lambda w: w.s2_eps)
        put("sigma2_eta", self.s2_eta,
            "Var(unit mean of level residual net of time effects) - sigma2_eps*mean(1/T_i)",
            lambda w: w.s2_eta)
        put("time_effects", list(self.delta),
            f"{te} of the level residual y - sum of the true terms (they hold the intercept)",
            lambda w: list(w.delta))
        if scale is None:
            put("unit_heteroskedasticity", None,
                "off: one shock variance for every unit ([simulate] heteroskedastic = false)",
                lambda w: None)
        else:
            q = np.quantile(scale, [0.0, 0.1, 0.5, 0.9, 1.0])
            put("unit_heteroskedasticity",
                {"quantiles_0_10_50_90_100": [float(v) for v in q], "sd": float(np.std(scale)),
                 "shrinkage": self.shrinkage},
                "per unit: mean (transformed residual)^2/(2 sigma2_eps), shrunk towards 1 by "
                "the share of sampling noise (Morris 1983), normalised to mean 1",
                lambda w: None if w.unit_scale is None else
                {"sd": float(np.std(w.unit_scale)), "shrinkage": w.shrinkage})
        for j, name in enumerate(self.regressors):
            put(f"{name}.ar1", self.r[j],
                "Anderson-Hsiao IV (x_t-2 for dx_t-1), with period effects" if self.time_effects
                else "Anderson-Hsiao IV (x_t-2 for dx_t-1)", lambda w, j=j: w.r[j])
            put(f"{name}.time_effects", list(self.tau[j]),
                f"{te} of x_t - ar1*x_t-1", lambda w, j=j: list(w.tau[j]))
            put(f"{name}.sigma2_v", self.s2_v[j], "Var(differenced AR(1) residual)/2",
                lambda w, j=j: w.s2_v[j])
            put(f"{name}.sigma2_mu", self.s2_mu[j], "unit means net of sigma2_v/T_i",
                lambda w, j=j: w.s2_mu[j])
            put(f"{name}.cov_mu_eta", self.cov_mu_eta[j], "unit means of the residuals",
                lambda w, j=j: w.cov_mu_eta[j])
            put(f"{name}.cov_v_eps", self.cov_v_eps[j], {
                Role.ENDOGENOUS.value: "Cov(dv_t, deps_t)/2 (contemporaneous)",
                Role.PREDETERMINED.value: "E[dv_t deps_t-1] (previous shock)",
            }.get(self.kinds[j], "0 (exogenous)"), lambda w, j=j: w.cov_v_eps[j])
            params[f"{name}.kind"] = {"value": self.kinds[j], "method": "model file"}
        return {
            "initial": self.initial,
            "initial_method": ("stationary: starts at the mean given the unit effects, "
                               f"burn-in {self.burn_in} periods" if self.stationary else
                               f"not stationary: starts at zero, long burn-in {self.burn_in} periods"),
            "units": int(self.mask.shape[0]), "periods": [int(p) for p in self.periods],
            "observed_cells": int(self.mask.sum()),
            "time_effects": self.time_effects,
            "heteroskedastic": scale is not None,
            "parameters": params,
        }


def calibrate(frame: pd.DataFrame, *, unit: str, period: str, outcome: str,
              regressors: dict[str, str], truth: dict[str, float],
              outcome_lags=(1,), lags: dict[str, tuple[int, ...]] | None = None,
              time_effects: bool = True, heteroskedastic: bool = False,
              initial: str = "stationary") -> World:
    """Estimate a :class:`World` from a long ``frame``.

    ``regressors``: name → kind (``options.Role`` value); ``lags``: name → the lags of
    the regressor in the model (default ``(0,)``); ``truth``: term label
    (``y[t-1]``, ``x[t]``, ``x[t-1]``, ...) → its coefficient (the base model's or
    ``[simulate.truth]``; a term not named is 0); ``time_effects``: the model has
    period effects (else one intercept); ``heteroskedastic``: copy the data's
    heteroskedasticity across units.
    """
    lags = {k: tuple((lags or {}).get(k, (0,))) for k in regressors}
    units = np.sort(frame[unit].unique())
    periods = np.sort(frame[period].unique())
    y = _wide(frame, unit, period, outcome, units, periods)
    xs = {k: _wide(frame, unit, period, k, units, periods) for k in regressors}
    ar = tuple((int(lag), float(truth.get(term_label(outcome, lag), 0.0)))
               for lag in outcome_lags)
    betas = tuple(tuple((int(lag), float(truth.get(term_label(k, lag), 0.0)))
                        for lag in lags[k]) for k in regressors)
    u = y.copy()
    for lag, v in ar:
        u = u - v * _lag(y, lag)
    for k, terms in zip(regressors, betas):
        for lag, v in terms:
            u = u - v * _lag(xs[k], lag)
    delta = _period_means(u, time_effects)
    w = u - np.nan_to_num(delta)[None, :]
    s2_eps, s2_eta = _var_components(w)
    scale, lam = _unit_scale(w, s2_eps) if heteroskedastic else (None, None)
    de = w - _lag(w)
    um = np.nanmean(w, axis=1) if np.isfinite(w).any() else np.full(len(units), np.nan)
    r, s2_v, s2_mu, cme, cve, tau = [], [], [], [], [], []
    for k, kind in regressors.items():
        x = xs[k]
        rk = _anderson_hsiao(x, time_effects)
        e = x - rk * _lag(x)
        tk = _period_means(e, time_effects)
        e = e - np.nan_to_num(tk)[None, :]
        sv, smu = _var_components(e)
        dv = e - _lag(e)
        em = np.nanmean(e, axis=1)
        ok = np.isfinite(em) & np.isfinite(um)
        # Cov(mean v_i, mean u_i) contains Cov(mu, eta) plus shock terms of order 1/T; kept as is
        cme.append(float(np.cov(em[ok], um[ok])[0, 1]) if ok.sum() > 1 else 0.0)
        if kind == Role.ENDOGENOUS.value:
            cve.append(_nanmean_prod(dv, de) / 2.0)
        elif kind == Role.PREDETERMINED.value:
            cve.append(_nanmean_prod(dv, _lag(de)))
        else:
            cve.append(0.0)
        r.append(rk); s2_v.append(sv); s2_mu.append(smu); tau.append(tk)
    # the burn-in's constant time effects: where the process is stationary, those
    # whose stationary mean is the data's mean in the first period (so the first
    # periods, which have no residual and whose history is unknown, start where the
    # data do); else the mean of the estimated effects. Periods without a residual
    # use them too.
    stationary = _stable(ar) and all(abs(v) < 1 for v in r)
    x0 = [_first_mean(xs[k]) for k in regressors]
    tau_burn = []
    for tk, rk, m0 in zip(tau, r, x0):
        tau_burn.append((1.0 - rk) * m0 if stationary and m0 is not None
                        else float(np.nanmean(tk)) if np.isfinite(tk).any() else 0.0)
    y0 = _first_mean(y)
    if stationary and y0 is not None and all(m is not None for m in x0):
        delta_burn = (1.0 - sum(v for _, v in ar)) * y0 - sum(
            v * (m0 if m0 is not None else 0.0) for terms, m0 in zip(betas, x0) for _, v in terms)
    else:
        delta_burn = float(np.nanmean(delta)) if np.isfinite(delta).any() else 0.0
    delta = np.where(np.isfinite(delta), delta, delta_burn)
    tau = [tuple(float(v) for v in np.where(np.isfinite(tk), tk, tb))
           for tk, tb in zip(tau, tau_burn)]
    mask = np.isfinite(y) & np.all([np.isfinite(x) for x in xs.values()], axis=0) \
        if xs else np.isfinite(y)
    with np.errstate(all="ignore"):
        dev = {outcome: y[:, 0] - np.nanmean(y, axis=1)}
    return World(unit=unit, period=period, units=units, periods=periods, outcome=outcome,
                 regressors=tuple(regressors), kinds=tuple(regressors.values()), ar=ar,
                 betas=betas, s2_eps=s2_eps, s2_eta=s2_eta, r=tuple(r), s2_v=tuple(s2_v),
                 s2_mu=tuple(s2_mu), cov_mu_eta=tuple(cme), cov_v_eps=tuple(cve),
                 delta=tuple(float(v) for v in delta), tau=tuple(tau),
                 delta_burn=float(delta_burn), tau_burn=tuple(float(v) for v in tau_burn),
                 mask=mask,
                 time_effects=bool(time_effects), unit_scale=scale, shrinkage=lam,
                 start_dev=dev, initial=initial)


def recalibrate(world: World, frame: pd.DataFrame) -> World:
    """The calibration of ``world`` run again on ``frame`` (a simulated panel), with
    the same truth and settings: how well the simulated world reproduces the numbers
    it was calibrated to."""
    return calibrate(frame, unit=world.unit, period=world.period, outcome=world.outcome,
                     regressors=dict(zip(world.regressors, world.kinds)), truth=world.truth(),
                     outcome_lags=tuple(lag for lag, _ in world.ar),
                     lags={k: tuple(lag for lag, _ in terms)
                           for k, terms in zip(world.regressors, world.betas)},
                     time_effects=world.time_effects,
                     heteroskedastic=world.unit_scale is not None, initial=world.initial)


def fit_summary(frame: pd.DataFrame, sim: pd.DataFrame, columns, *, unit: str,
                period: str) -> dict:
    """Real vs simulated: mean, variance, first-order autocorrelation (within unit),
    missing share and the mean of each period of each column (``calibration.json``
    ``fit``)."""
    periods = np.sort(frame[period].unique())

    def stats(f):
        out = {}
        f = f.sort_values([unit, period])
        for c in columns:
            s = f[c]
            lag = f.groupby(unit)[c].shift(1)
            m = s.notna() & lag.notna()
            by = s.groupby(f[period]).mean().reindex(periods)
            out[c] = {"mean": float(s.mean()), "variance": float(s.var()),
                      "autocorrelation": float(np.corrcoef(s[m], lag[m])[0, 1]) if m.sum() > 2 else None,
                      "missing_share": float(s.isna().mean()),
                      "period_means": [None if not np.isfinite(v) else float(v) for v in by]}
        return out
    return {"real": stats(frame), "simulated": stats(sim)}
