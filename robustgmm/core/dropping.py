"""The smallest set of units whose removal overturns a conclusion (Broderick, Giordano
& Meager 2020; Huang, Burt, Shen, Nguyen & Broderick 2024).

For one focus term (a coefficient or a long-run effect, whose influence is the
chain rule of :meth:`.influence.UnitSums.term_influence`) with base estimate ``b₀`` (sign ``s = sign(b₀)``, +1 at zero),
t-statistic ``z₀`` and normal p-value ``p₀``, three targets
(:class:`robustgmm.options.DropTarget`), each judged on an **exact refit**
(:meth:`.influence.UnitSums.refit`):

* ``sign``: ``s·b ≤ 0``;
* ``significance``: ``p ≥ alpha`` when ``p₀ < alpha`` (significance lost), else
  ``p < alpha`` (gained);
* ``opposite_significant``: ``s·b < 0`` and ``p < alpha``.

Method, per target:

1. **additive approximation** (Broderick, Giordano & Meager 2020, section 3): the
   predicted change of the objective (``s·b`` for the sign, ``s·z`` otherwise) when
   unit ``i`` is dropped is ``−∂(·)/∂w_i`` (:mod:`.influence`; for ``z`` the standard
   error held fixed); units are sorted by it and the shortest prefix whose summed
   change reaches the target is proposed, then refitted exactly;
2. **recursive greedy search** (Huang et al. 2024, section 4): drop the unit with the
   most helpful influence, refit exactly, recompute every influence on the reduced
   sample, repeat until the refit reaches the target or ``max_drop`` units are gone.

Reported: the smaller of the two sets whose exact refit reaches the target (the
greedy one on a tie), its exact estimate, standard error and p-value, and the units
in the order dropped; when neither reaches the target within ``max_drop`` units,
``reached = False`` with the exact refit at the greedy search's last set ("not
reached within the share" is an answer, not a failure). For ``significance`` with a
base that is not significant both directions are searched and the smaller set kept.

Cost per greedy step: one exact refit and one influence on the reduced sample, both
from the stored per-unit sums, ``O(N·L·(K + L) + L³)`` with no pass over the data
when the per-unit ``Z_i'HZ_i`` fit the memory budget (else one pass for the
``Z_i'HZ_i`` forms; :mod:`.influence`); the whole search is at most ``max_drop``
steps per target.
The found set is an upper bound on the smallest set: greedy search is not exhaustive
(the tests compare it with exhaustive search on a small panel).
"""
from __future__ import annotations

import math
from statistics import NormalDist
from dataclasses import dataclass, field

import numpy as np

from ..options import DropTarget
from .influence import Refit, UnitSums

#: Default largest share of units a search may drop (issue 16: 5% of units; a
#: robustgmm default, not a published threshold).
MAX_DROP_SHARE = 0.05


@dataclass(frozen=True)
class PathPoint:
    """One step of the greedy path: units dropped so far and the exact refit's term."""

    dropped: int
    estimate: float
    std_error: float
    p_value: float


@dataclass(frozen=True)
class DropResult:
    """The answer for one (term, target)."""

    term: str
    target: DropTarget
    reached: bool
    dropped: tuple[int, ...]          # unit positions on the panel, in the order dropped
    estimate: float
    std_error: float
    p_value: float
    max_drop: int
    n_units: int
    method: str                       # "greedy", "additive" or "" (not reached)
    additive_size: int | None = None  # units the additive approximation proposed
    path: tuple[PathPoint, ...] = field(default=())

    @property
    def share(self) -> float:
        return len(self.dropped) / self.n_units if self.n_units else math.nan


def max_drop_for(n_units: int, share: float) -> int:
    """The largest number of units a search may drop: ``floor(share · n_units)``."""
    return int(math.floor(share * n_units + 1e-9))


def _reached(target: DropTarget, s0: float, sig0: bool, b: float, p: float,
             alpha: float) -> bool:
    """Whether an exact refit (estimate ``b``, p-value ``p``) reaches ``target``."""
    if not (math.isfinite(b) and math.isfinite(p)):
        return False
    match target:
        case DropTarget.SIGN:
            return s0 * b <= 0
        case DropTarget.SIGNIFICANCE:
            return (not p < alpha) if sig0 else p < alpha
        case DropTarget.OPPOSITE_SIGNIFICANT:
            return s0 * b < 0 and p < alpha
    raise ValueError(f"unknown target {target!r}")


class Search:
    """Searches of one model: the base refit, its influence and every refit on the way
    are shared between the terms and targets."""

    def __init__(self, sums: UnitSums, alpha: float, max_drop_share: float = MAX_DROP_SHARE):
        if not 0 < max_drop_share < 1:
            raise ValueError(f"max_drop_share must be in (0, 1), not {max_drop_share!r}")
        self.sums = sums
        self.alpha = alpha
        self.zc = _z_crit(alpha)
        self.n_units = int(sums.active.sum())
        self.max_drop = max_drop_for(self.n_units, max_drop_share)
        self.base, self.base_influence = sums.state(())
        self._states: dict[tuple, tuple[Refit, np.ndarray]] = {(): (self.base, self.base_influence)}

    def _state(self, dropped: tuple) -> tuple[Refit, np.ndarray]:
        # computed on the sorted set, never in the order dropped: the sums over the
        # dropped units then do not depend on which search reached the set first, so
        # a refit is the same to the last bit with or without this cache, and
        # searches split over several Search objects (the audit's tasks per term)
        # give the tables of one Search
        key = tuple(sorted(dropped))
        out = self._states.get(key)
        if out is None:
            out = self._states[key] = self.sums.state(key)
        return out

    def run(self, term, target: DropTarget) -> DropResult:
        """The smallest found set for ``term`` (a label of ``sums.term_labels``, a
        coefficient or a long-run effect; or a coefficient position) and ``target``
        (module docstring)."""
        label = self.sums.labels[term] if isinstance(term, (int, np.integer)) else term
        sig0 = bool(self.base.term(label)[3] < self.alpha)
        if target == DropTarget.SIGNIFICANCE and not sig0:
            tries = [self._run(label, target, -1.0), self._run(label, target, +1.0)]
            hit = [r for r in tries if r.reached]
            return min(hit, key=lambda r: len(r.dropped)) if hit else tries[0]
        return self._run(label, target, +1.0)

    def _run(self, label: str, target: DropTarget, d: float) -> DropResult:
        """One search. The objective ``o = d·s·q`` (``q = b`` for the sign, ``z``
        otherwise; ``d = −1`` only when gaining significance in the base's own
        direction) must fall below ``threshold``: 0 for the sign, ``z_c`` to lose
        significance, ``−z_c`` to gain it or to reach the opposite sign."""
        sums = self.sums
        b0, _, _, p0 = self.base.term(label)
        s0 = 1.0 if b0 >= 0 else -1.0
        sig0 = bool(p0 < self.alpha)
        on_b = target == DropTarget.SIGN
        threshold = 0.0 if on_b else (self.zc if (target == DropTarget.SIGNIFICANCE and sig0)
                                      else -self.zc)

        def objective(refit):
            est, _, z, _ = refit.term(label)
            return d * s0 * float(est if on_b else z)

        def change_of(refit, infl, mask):
            """Predicted change of ``o`` when each unit is dropped (first order; ``z``
            with the standard error held fixed), ``inf`` where not a candidate."""
            di = sums.term_influence(label, refit, infl)
            c = -di if on_b else -di / refit.term(label)[1]
            c = d * s0 * c
            return np.where(mask & np.isfinite(c), c, np.inf)

        def reached(refit):
            est, _, _, p = refit.term(label)
            return _reached(target, s0, sig0, est, p, self.alpha)

        def point(n, refit):
            est, se, _, p = refit.term(label)
            return PathPoint(n, est, se, p)

        active = sums.active.copy()
        candidates = {}
        # 1. additive approximation: the shortest prefix of units sorted by influence
        change = change_of(self.base, self.base_influence, active)
        order = np.argsort(change, kind="stable")
        helpful = order[change[order] < 0][: self.max_drop]
        below = np.flatnonzero(objective(self.base) + np.cumsum(change[helpful]) < threshold)
        additive_size = None
        if below.size:
            additive_size = int(below[0]) + 1
            prop = tuple(int(i) for i in helpful[:additive_size])
            key = tuple(sorted(prop))
            refit = self._states[key][0] if key in self._states else sums.refit(key)
            if reached(refit):
                candidates["additive"] = (prop, refit)
        # 2. recursive greedy search, an exact refit at every step
        dropped: tuple = ()
        refit, infl = self.base, self.base_influence
        path = [point(0, refit)]
        while len(dropped) < self.max_drop:
            mask = active.copy()
            mask[list(dropped)] = False
            change = change_of(refit, infl, mask)
            best = int(np.argmin(change))
            if not np.isfinite(change[best]):
                break
            dropped = dropped + (best,)
            refit, infl = self._state(dropped)
            path.append(point(len(dropped), refit))
            if reached(refit):
                candidates["greedy"] = (dropped, refit)
                break
        if candidates:
            method = min(candidates, key=lambda m: (len(candidates[m][0]), m != "greedy"))
            found, best_fit = candidates[method]
            est, se, _, p = best_fit.term(label)
            return DropResult(label, target, True, found, est, se, p, self.max_drop,
                              self.n_units, method, additive_size, tuple(path))
        est, se, _, p = refit.term(label)
        return DropResult(label, target, False, dropped, est, se, p, self.max_drop,
                          self.n_units, "", additive_size, tuple(path))


def _z_crit(alpha: float) -> float:
    """The two-sided normal critical value of ``alpha``."""
    return NormalDist().inv_cdf(1.0 - alpha / 2.0)


def smallest_sets(sums: UnitSums, terms, alpha: float,
                  max_drop_share: float = MAX_DROP_SHARE) -> list[DropResult]:
    """:class:`DropResult` for every term label in ``terms`` (coefficients or long-run
    effects, :attr:`.influence.UnitSums.term_labels`) and every target."""
    search = Search(sums, alpha, max_drop_share)
    return [search.run(label, target) for label in terms for target in DropTarget]
