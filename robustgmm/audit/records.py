"""The typed records of a verdict (what :mod:`robustgmm.audit.verdicts` returns and
``verdict.json`` holds): frozen dataclasses with ``to_dict()`` (plain JSON values) and
``from_dict()`` (the report reads verdict.json back into them). No rule is evaluated
here; the formats are in docs/formats.md.
"""
from __future__ import annotations

import math
from dataclasses import asdict, dataclass, field
from typing import Any, Mapping

import numpy as np
import pandas as pd

from ..options import Effect, Verdict


def _clean(obj):
    """Plain JSON values: numpy scalars to Python, NaN to None, enums to words."""
    if isinstance(obj, dict):
        return {str(k): _clean(v) for k, v in obj.items()}
    if isinstance(obj, (list, tuple)):
        return [_clean(v) for v in obj]
    if isinstance(obj, (bool, np.bool_)):
        return bool(obj)
    if isinstance(obj, str):
        return str(obj)
    if isinstance(obj, (int, np.integer)):
        return int(obj)
    if isinstance(obj, (float, np.floating)):
        x = float(obj)
        return x if math.isfinite(x) else None
    if obj is pd.NA:
        return None
    return obj


def _num(x) -> float:
    try:
        return float(x)
    except (TypeError, ValueError):
        return math.nan



# ---------------------------------------------------------------------------
# typed records
# ---------------------------------------------------------------------------
@dataclass(frozen=True)
class Rule:
    """A rule of the catalogue."""

    id: str
    level: str             # "variant" or "term"
    description: str
    source: str
    threshold: str | None  # name of the setting that holds the threshold
    effect: Effect

    def to_dict(self, thresholds: Mapping[str, Any] | None = None) -> dict:
        out = {"id": self.id, "level": self.level, "description": self.description,
               "source": self.source, "threshold": self.threshold,
               "effect": str(self.effect)}
        out["threshold_value"] = (None if not self.threshold or thresholds is None
                                  else thresholds.get(self.threshold))
        return _clean(out)

    @classmethod
    def from_dict(cls, d: Mapping) -> "Rule":
        return cls(str(d["id"]), str(d.get("level", "")), str(d.get("description", "")),
                   str(d.get("source", "")), d.get("threshold"), Effect(d["effect"]))


@dataclass(frozen=True)
class Firing:
    """A rule that fired, with the figures that made it fire."""

    id: str
    description: str
    source: str
    threshold_name: str | None
    threshold: Any
    effect: Effect
    figures: Mapping[str, Any] = field(default_factory=dict)

    def to_dict(self) -> dict:
        return _clean({"id": self.id, "description": self.description, "source": self.source,
                       "threshold": self.threshold, "threshold_name": self.threshold_name,
                       "effect": str(self.effect), "figures": dict(self.figures)})

    @classmethod
    def from_dict(cls, d: Mapping) -> "Firing":
        return cls(str(d["id"]), str(d.get("description", "")), str(d.get("source", "")),
                   d.get("threshold_name"), d.get("threshold"), Effect(d["effect"]),
                   dict(d.get("figures") or {}))


@dataclass(frozen=True)
class BaseEstimate:
    estimate: float
    std_error: float
    p_value: float
    significant: bool

    def to_dict(self) -> dict:
        return _clean(asdict(self))

    @classmethod
    def from_dict(cls, d: Mapping | None) -> "BaseEstimate | None":
        if not d:
            return None
        return cls(_num(d.get("estimate")), _num(d.get("std_error")), _num(d.get("p_value")),
                   bool(d.get("significant")))


@dataclass(frozen=True)
class Driver:
    """One value of one varied setting among a term's judged variants (Young &
    Holsteen 2017): count, mean estimate, share significant, and the shift of the
    estimate against the base model's value of the setting."""

    setting: str
    value: str
    variants: int
    mean_estimate: float
    share_significant: float
    shift: float | None
    significant: int = 0

    def to_dict(self) -> dict:
        return _clean(asdict(self))

    @classmethod
    def from_dict(cls, d: Mapping) -> "Driver":
        return cls(str(d["setting"]), str(d["value"]), int(d["variants"]),
                   _num(d.get("mean_estimate")), _num(d.get("share_significant")),
                   None if d.get("shift") is None else float(d["shift"]),
                   int(d.get("significant", 0)))


@dataclass(frozen=True)
class Influence:
    """Young & Holsteen (2017) summary over the judged variants."""

    variants: int
    mean_estimate: float
    modeling_sd: float
    sampling_sd: float
    total_sd: float
    robustness_ratio: float

    def to_dict(self) -> dict:
        return _clean(asdict(self))

    @classmethod
    def from_dict(cls, d: Mapping | None) -> "Influence | None":
        if not d:
            return None
        return cls(int(d["variants"]), *(_num(d.get(k)) for k in (
            "mean_estimate", "modeling_sd", "sampling_sd", "total_sd", "robustness_ratio")))


@dataclass(frozen=True)
class TermVerdict:
    """The judgement of one focus term.

    ``figures`` holds the counts every document prints: ``variants_ok`` (estimated),
    ``judged``, ``positive``, ``negative``, ``significant``, ``significant_positive``,
    ``significant_negative``, ``min``/``max``/``median`` over the judged variants,
    ``ok_min``/``ok_max`` over every estimated one, ``untestable`` and ``duplicates``
    (estimating the term, not judged), ``informative``, ``uninformative_ids``,
    ``without_term`` (judged variants whose lag structure or controls leave the term
    out: not counted for it).
    ``key_driver`` is the setting the conclusion depends on most (see
    :func:`_key_driver`)."""

    term: str
    verdict: Verdict
    reason: str
    summary: str
    base: BaseEstimate | None
    figures: Mapping[str, Any]
    rules: tuple[Firing, ...] = ()
    passed: tuple[str, ...] = ()
    not_evaluated: tuple[str, ...] = ()
    drivers: tuple[Driver, ...] = ()
    key_driver: Mapping[str, Any] | None = None
    influence: Influence | None = None

    @property
    def fired(self) -> tuple[Firing, ...]:
        return self.rules

    def fired_ids(self) -> list[str]:
        return [r.id for r in self.rules]

    def to_dict(self) -> dict:
        return _clean({
            "verdict": str(self.verdict), "reason": self.reason, "summary": self.summary,
            "base": None if self.base is None else self.base.to_dict(),
            "figures": dict(self.figures), "rules": [r.to_dict() for r in self.rules],
            "passed": list(self.passed), "not_evaluated": list(self.not_evaluated),
            "drivers": [d.to_dict() for d in self.drivers],
            "key_driver": None if self.key_driver is None else dict(self.key_driver),
            "influence": None if self.influence is None else self.influence.to_dict(),
        })

    @classmethod
    def from_dict(cls, term: str, d: Mapping) -> "TermVerdict":
        return cls(term, Verdict(d["verdict"]), str(d.get("reason", "")),
                   str(d.get("summary", "")), BaseEstimate.from_dict(d.get("base")),
                   dict(d.get("figures") or {}),
                   tuple(Firing.from_dict(r) for r in d.get("rules") or ()),
                   tuple(d.get("passed") or ()), tuple(d.get("not_evaluated") or ()),
                   tuple(Driver.from_dict(x) for x in d.get("drivers") or ()),
                   d.get("key_driver"), Influence.from_dict(d.get("influence")))


@dataclass(frozen=True)
class AuditVerdict:
    """The verdict document (``verdict.json``)."""

    alpha: float
    base_variant: str | None
    base_acceptable: bool
    base_evidence: str | None
    base_statement: str
    closest_acceptable: Mapping[str, Any] | None
    thresholds: Mapping[str, Any]
    variants: Mapping[str, int]
    diagnostics: Mapping[str, Any]
    terms: tuple[TermVerdict, ...]
    model: tuple[Firing, ...]
    rules: tuple[Rule, ...] = ()
    combination: str = ""
    disclaimer: str = ""

    def term(self, label: str) -> TermVerdict:
        for t in self.terms:
            if t.term == label:
                return t
        raise KeyError(label)

    def model_rule(self, rule_id: str) -> Firing | None:
        return next((f for f in self.model if f.id == rule_id), None)

    def to_dict(self) -> dict:
        return _clean({
            "alpha": self.alpha, "base_variant": self.base_variant,
            "base_acceptable": self.base_acceptable, "base_evidence": self.base_evidence,
            "base_statement": self.base_statement,
            "closest_acceptable": (None if self.closest_acceptable is None
                                   else dict(self.closest_acceptable)),
            "thresholds": dict(self.thresholds), "combination": self.combination,
            "disclaimer": self.disclaimer, "variants": dict(self.variants),
            "diagnostics": dict(self.diagnostics),
            "terms": {t.term: t.to_dict() for t in self.terms},
            "model": [f.to_dict() for f in self.model],
            "rules": [r.to_dict(self.thresholds) for r in self.rules],
        })

    @classmethod
    def from_dict(cls, d: Mapping) -> "AuditVerdict":
        return cls(
            alpha=float(d["alpha"]), base_variant=d.get("base_variant"),
            base_acceptable=bool(d.get("base_acceptable")),
            base_evidence=d.get("base_evidence"), base_statement=str(d.get("base_statement", "")),
            closest_acceptable=d.get("closest_acceptable"),
            thresholds=dict(d.get("thresholds") or {}), variants=dict(d.get("variants") or {}),
            diagnostics=dict(d.get("diagnostics") or {}),
            terms=tuple(TermVerdict.from_dict(k, v) for k, v in (d.get("terms") or {}).items()),
            model=tuple(Firing.from_dict(f) for f in d.get("model") or ()),
            rules=tuple(Rule.from_dict(r) for r in d.get("rules") or ()),
            combination=str(d.get("combination", "")), disclaimer=str(d.get("disclaimer", "")))


@dataclass(frozen=True)
class Evaluation:
    """What :func:`evaluate` returns: the per-variant columns (index of the variants
    table) and the verdict."""

    columns: pd.DataFrame
    verdict: AuditVerdict
    #: the judged variants (acceptable, not duplicates; plan order)
    judged: tuple[str, ...] = ()
