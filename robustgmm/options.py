"""The vocabulary: every choice a model or an audit can make, as enums.

Each enum's values are the words of the model file and of the output files, so a
member compares equal to its word (``Equations.SYSTEM == "system"``) and is written
to JSON and CSV as that word. :func:`parse` turns a word into a member and rejects
anything else with the list of valid words, so a misspelt option can never reach the
estimator. ``LABELS`` holds the one human-readable label of each member that every
document (terminal summary, reports, tables) uses.
"""
from __future__ import annotations

import enum
from typing import Any, TypeVar


class Equations(enum.StrEnum):
    """Difference GMM (Arellano & Bond 1991) or system GMM (Arellano & Bover 1995;
    Blundell & Bond 1998)."""
    DIFFERENCE = "difference"
    SYSTEM = "system"


class Transform(enum.StrEnum):
    """First differences or forward orthogonal deviations (Arellano & Bover 1995)."""
    FD = "fd"
    FOD = "fod"


class Form(enum.StrEnum):
    """One instrument column per period and lag, or one per lag (Roodman 2009)."""
    PER_PERIOD = "per-period"
    COLLAPSED = "collapsed"


class Errors(enum.StrEnum):
    """Robust (one-step: clustered by unit; two-step: Windmeijer 2005) or
    conventional (homoskedastic) standard errors."""
    ROBUST = "robust"
    CONVENTIONAL = "conventional"


class Role(enum.StrEnum):
    """How a regressor relates to the shocks (Arellano & Bond 1991)."""
    ENDOGENOUS = "endogenous"
    PREDETERMINED = "predetermined"
    EXOGENOUS = "exogenous"


class Steps(enum.Enum):
    """One-step, two-step (Hansen 1982) or iterated (Hansen, Heaton & Yaron 1996)
    weighting. The values are the model file's: the integers 1 and 2, the word
    ``"iterated"``."""
    ONE = 1
    TWO = 2
    ITERATED = "iterated"

    def __str__(self) -> str:  # the model file's word
        return str(self.value)


class CovarianceKind(enum.StrEnum):
    """Which variance estimator a fit reports (written as ``se_kind``)."""
    CLUSTER_ROBUST = "cluster-robust"
    CONVENTIONAL = "conventional"
    WINDMEIJER = "windmeijer"
    WINDMEIJER_ITERATED = "windmeijer-iterated"


class Verdict(enum.StrEnum):
    """The judgement of a focus term across the acceptable variants."""
    ROBUST = "robust"
    FRAGILE = "fragile"
    INCONCLUSIVE = "inconclusive"


class Status(enum.StrEnum):
    """What happened to a variant."""
    OK = "ok"
    FAILED = "failed"
    SKIPPED = "skipped"


class Evidence(enum.StrEnum):
    """What a variant can tell about a conclusion (column ``evidence`` of
    variants.csv). ``acceptable``: estimated, every required specification test
    computed and passed; ``untestable``: estimated and no test rejects, but a required
    test cannot be computed (an exactly identified instrument set leaves nothing for
    the Hansen test); ``rejected``: a specification test rejects; ``failed``: the
    estimation failed; ``skipped``: not estimated (impossible, or the same estimation
    as another variant)."""
    ACCEPTABLE = "acceptable"
    UNTESTABLE = "untestable"
    REJECTED = "rejected"
    FAILED = "failed"
    SKIPPED = "skipped"


class Effect(enum.StrEnum):
    """What a verdict rule does when it fires."""
    EXCLUDE = "variant not acceptable"
    UNTESTABLE = "variant untestable"
    CAUTION = "caution"
    FRAGILE = "fragile"
    INCONCLUSIVE = "inconclusive"
    INFORMATION = "information"


class DropTarget(enum.StrEnum):
    """What dropping units tries to overturn for one focus term (column ``target`` of
    influence.csv): the sign of the estimate; its significance at alpha (lost when
    the base is significant, gained when it is not); a significant estimate of the
    opposite sign."""
    SIGN = "sign"
    SIGNIFICANCE = "significance"
    OPPOSITE_SIGNIFICANT = "opposite_significant"


class InfluenceScope(enum.StrEnum):
    """Which models the dropping-units analysis covers (``[audit] influence``)."""
    NONE = "none"
    BASE = "base"
    ALL = "all"


class Initial(enum.StrEnum):
    """Initial conditions of the simulated world (``[simulate] initial``, ``--initial``):
    mean-stationary starts, or the data's first-period deviations from the unit means
    (:mod:`robustgmm.montecarlo.calibrate`)."""
    STATIONARY = "stationary"
    DATA = "data"


LABELS: dict[Any, str] = {
    Equations.DIFFERENCE: "difference GMM",
    Equations.SYSTEM: "system GMM",
    Transform.FD: "first differences",
    Transform.FOD: "forward orthogonal deviations",
    Form.PER_PERIOD: "per-period instruments",
    Form.COLLAPSED: "collapsed instruments",
    Errors.ROBUST: "robust errors",
    Errors.CONVENTIONAL: "conventional errors",
    Role.ENDOGENOUS: "endogenous",
    Role.PREDETERMINED: "predetermined",
    Role.EXOGENOUS: "exogenous",
    Steps.ONE: "one-step",
    Steps.TWO: "two-step",
    Steps.ITERATED: "iterated",
    CovarianceKind.CLUSTER_ROBUST: "cluster-robust (by unit)",
    CovarianceKind.CONVENTIONAL: "conventional",
    CovarianceKind.WINDMEIJER: "Windmeijer-corrected",
    CovarianceKind.WINDMEIJER_ITERATED: "Windmeijer-corrected, iterated",
    DropTarget.SIGN: "sign reversed",
    DropTarget.SIGNIFICANCE: "significance changed",
    DropTarget.OPPOSITE_SIGNIFICANT: "significant with the opposite sign",
}

E = TypeVar("E", bound=enum.Enum)


def parse(kind: type[E], value: Any) -> E:
    """The member of ``kind`` whose value is ``value`` (a member passes through).

    Raises ``ValueError`` naming the valid words; booleans are never accepted as
    the integers 1 and 2."""
    if isinstance(value, kind):
        return value
    if not isinstance(value, bool):
        for member in kind:
            if member.value == value:
                return member
    words = ", ".join(repr(m.value) for m in kind)
    raise ValueError(f"{value!r} is not one of {words}")


def label(kind: type[E], value: Any) -> str:
    """The display label of an option value of ``kind`` (a member or its word).

    The kind is named because a word can belong to two vocabularies
    (``"conventional"`` is both an :class:`Errors` choice and a
    :class:`CovarianceKind`)."""
    return LABELS[parse(kind, value)]


#: Data file kinds the data layer reads (the model file checks [data] file against it).
DATA_EXTENSIONS = (".csv", ".parquet", ".dta", ".xlsx")

#: Name of the level-equation instrument group of system GMM in
#: ``FitResult.difference_hansen`` (the core writes it, the verdicts read it).
LEVEL_GROUP = "level equation"
