"""Variance estimators of the coefficients, one small :class:`Covariance` each (its
kind and formula), chosen from a registry keyed by (steps, errors).

| steps \\ errors | robust | conventional |
|---|---|---|
| one-step | ``ClusterRobust`` ``B₁ X'ZA S A Z'X B₁`` | ``ConventionalOneStep`` ``σ̂² B₁`` (difference GMM only) |
| two-step | ``Windmeijer`` ``V₂ + D V₂ + V₂ D' + D V₁ D'`` (Windmeijer 2005, eq. (3.4)) | ``ConventionalEfficient`` ``B₂ = (X'ZWZ'X)⁻¹`` |
| iterated | ``WindmeijerIterated`` ``(I − D)⁻¹ V₂ (I − D)⁻ᵀ`` | ``ConventionalEfficient`` |

``B₁ = (X'ZAZ'X)⁻¹``. The conventional one-step variance assumes that ``A`` is
proportional to the inverse covariance of the moments, which fails in system GMM
(the level errors contain the unit effect), so that combination is not offered
(:func:`.family.invalid_reason`).

Windmeijer's ``D = ∂b₂/∂b₁ = B₂ X'Z (∂W/∂b₁) Z'ê₂``. With a non-singular ``S``,
``∂W = −W ∂S W`` and ``D = B₂ X'Z W T(a)``, ``a = W Z'ê₂``, ``T(v)[:, k] = −(∂S/∂b_k) v``
(:func:`.moments.windmeijer_term`). With a singular ``S`` (more instruments than
units) the weight is ``W = d Ŝ⁺ d`` with ``Ŝ = d S d`` and the fixed instrument scale
``d`` (:meth:`.problem.GMMProblem.weight_from`); at constant rank the derivative
of the Moore–Penrose inverse is (Golub & Pereyra 1973, Theorem 4.3)
``∂Ŝ⁺ = −Ŝ⁺ ∂Ŝ Ŝ⁺ + Ŝ⁺² ∂Ŝ P̂⊥ + P̂⊥ ∂Ŝ Ŝ⁺²``, ``P̂⊥ = I − Ŝ Ŝ⁺``, so that
``D = B₂ X'Z [W T(a) − d Ŝ⁺² d T(d P̂⊥ d u) − d P̂⊥ d T(d Ŝ⁺² d u)]`` with
``u = Z'ê₂``: the derivative of the two-step map in both cases.
"""
from __future__ import annotations

from dataclasses import dataclass
from typing import Callable

import numpy as np

from ..options import CovarianceKind, Errors, Steps
from .linalg import rescale, scaled_pinv_parts


def windmeijer_vectors(prob, sol) -> list:
    """The vectors ``v`` whose terms ``T(v)`` the final pass sums for ``D``."""
    u = prob.zy - prob.zx @ sol.beta
    a = sol.weight @ u
    if sol.rank_w >= prob.L:
        return [a]
    d = prob.z_scale
    pinv, null = scaled_pinv_parts(sol.S_w, d)
    sol.pinv_parts = (pinv, null)
    du = d * u
    v2 = d * (null @ du)
    v3 = d * (pinv @ (pinv @ du))
    return [a, v2, v3]


def windmeijer_d(prob, sol) -> np.ndarray:
    """``D = ∂b₂/∂b₁`` from the terms of :func:`windmeijer_vectors` (module docstring)."""
    T = sol.task.T
    inner = sol.weight @ T[0]
    if len(T) > 1:
        d = prob.z_scale
        pinv, null = sol.pinv_parts
        inner = inner - rescale(pinv @ pinv, d) @ T[1] - rescale(null, d) @ T[2]
    return sol.bread @ (prob.zx.T @ inner)


@dataclass
class Inputs:
    """What every estimator may use: the problem, its one-step stage and solution."""

    prob: object
    one: object
    sol: object

    _d: np.ndarray | None = None

    @property
    def D(self) -> np.ndarray:
        if self._d is None:
            self._d = windmeijer_d(self.prob, self.sol)
        return self._d


@dataclass(frozen=True)
class Covariance:
    """A variance estimator: the kind of standard errors it reports and its formula,
    a function of the :class:`Inputs` (the formula's docstring gives its source)."""

    name: str
    kind: CovarianceKind
    formula: Callable[[Inputs], np.ndarray]

    def __call__(self, inp: Inputs) -> np.ndarray:
        return self.formula(inp)


def _cluster_robust(inp):
    """One-step, clustered by unit: ``B₁ X'ZA S A Z'X B₁`` (Arellano & Bond 1991)."""
    return inp.one.v_robust


def _conventional_one_step(inp):
    """One-step under homoskedasticity: ``σ̂² B₁`` (Arellano & Bond 1991)."""
    return inp.one.sigma2 * inp.one.bread


def _conventional_efficient(inp):
    """Two-step or iterated, uncorrected: ``(X'Z W Z'X)⁻¹`` (Hansen 1982)."""
    return inp.sol.bread


def _windmeijer(inp):
    """Two-step, Windmeijer (2005, eq. (3.4)): ``V₂ + D V₂ + V₂ D' + D V₁ D'``."""
    v2, D = inp.sol.bread, inp.D
    dv = D @ v2
    return v2 + dv + dv.T + D @ inp.one.v_robust @ D.T


def _windmeijer_iterated(inp):
    """Iterated GMM: at the fixed point ``b = f(b)``, ``b − β ≈ (I − D)⁻¹ M Z'u``, so
    ``(I − D)⁻¹ V₂ (I − D)⁻ᵀ`` (Windmeijer's expansion applied to the limit of the
    iteration; our derivation, docs/method.md)."""
    inv = np.linalg.inv(np.eye(inp.prob.K) - inp.D)
    return inv @ inp.sol.bread @ inv.T


ClusterRobust = Covariance("ClusterRobust", CovarianceKind.CLUSTER_ROBUST, _cluster_robust)
ConventionalOneStep = Covariance("ConventionalOneStep", CovarianceKind.CONVENTIONAL,
                                 _conventional_one_step)
ConventionalEfficient = Covariance("ConventionalEfficient", CovarianceKind.CONVENTIONAL,
                                   _conventional_efficient)
Windmeijer = Covariance("Windmeijer", CovarianceKind.WINDMEIJER, _windmeijer)
WindmeijerIterated = Covariance("WindmeijerIterated", CovarianceKind.WINDMEIJER_ITERATED,
                                _windmeijer_iterated)


REGISTRY: dict[tuple[Steps, Errors], Covariance] = {
    (Steps.ONE, Errors.ROBUST): ClusterRobust,
    (Steps.ONE, Errors.CONVENTIONAL): ConventionalOneStep,
    (Steps.TWO, Errors.ROBUST): Windmeijer,
    (Steps.TWO, Errors.CONVENTIONAL): ConventionalEfficient,
    (Steps.ITERATED, Errors.ROBUST): WindmeijerIterated,
    (Steps.ITERATED, Errors.CONVENTIONAL): ConventionalEfficient,
}


def estimator(steps: Steps, errors: Errors) -> Covariance:
    """The variance estimator of (steps, errors)."""
    try:
        return REGISTRY[(steps, errors)]
    except KeyError:
        raise ValueError(f"no variance estimator for steps {steps!r} with errors {errors!r}") from None


def needs_windmeijer(steps: Steps) -> bool:
    """Whether the robust variance of ``steps`` needs ``D`` (the AR tests always use
    the robust variance)."""
    match steps:
        case Steps.ONE:
            return False
        case Steps.TWO | Steps.ITERATED:
            return True
        case other:
            raise ValueError(f"unknown steps {other!r}")
