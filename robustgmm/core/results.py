"""Immutable results of one estimation, convertible to pandas and to one JSON record.

:meth:`FitResult.to_dict` is the one record of a fit: the JSON of ``robustgmm fit
--json`` (keys in :mod:`robustgmm.contract`, prose in ``docs/formats.md``) and what a
cache stores; :meth:`FitResult.from_dict` reads it back. The round trip is exact for
every finite number and for NaN (JSON has no NaN: it is written ``null`` and read
back as NaN; an infinity, which no fit produces, would come back as NaN too).
:class:`FitFailure` is the record of a variant that could not be estimated, with the
same conversions (``to_dict``/``from_dict``, ``to_frame``).
"""
from __future__ import annotations

import math
from dataclasses import dataclass, field
from types import MappingProxyType
from typing import Any, Mapping

import numpy as np
import pandas as pd


def _clean(x):
    """A float for JSON: NaN and infinities become None."""
    if x is None:
        return None
    x = float(x)
    return x if math.isfinite(x) else None


def _float(x) -> float:
    """The inverse of :func:`_clean`: None is NaN."""
    return math.nan if x is None else float(x)


def _plain(value):
    """Diagnostics as JSON values: arrays as nested lists, non-finite floats as None."""
    if isinstance(value, np.ndarray):
        return _plain(value.tolist())
    if isinstance(value, (list, tuple)):
        return [_plain(v) for v in value]
    if isinstance(value, (float, np.floating)):
        return _clean(value)
    if isinstance(value, np.integer):
        return int(value)
    return value


def _array(value):
    """The inverse of :func:`_plain` for one diagnostic: lists become float arrays."""
    if isinstance(value, list):
        return np.array([[_float(x) for x in row] if isinstance(row, list) else _float(row)
                         for row in value], dtype=float)
    return value


def _term_dict(t) -> dict:
    out = {"estimate": _clean(t.estimate), "std_error": _clean(t.std_error),
           "z": _clean(t.z), "p_value": _clean(t.p_value)}
    if t.reason is not None:
        out["reason"] = t.reason
    return out


@dataclass(frozen=True)
class TermEstimate:
    label: str
    estimate: float
    std_error: float
    z: float
    p_value: float
    #: why a derived term (a long-run effect) has no estimate; None otherwise
    reason: str | None = None


@dataclass(frozen=True)
class TestResult:
    """A test statistic with its p-value and degrees of freedom. A test that cannot
    be computed validly has no statistic (NaN) and a one-line ``reason``."""

    statistic: float
    p_value: float
    df: int | None = None
    reason: str | None = None

    @property
    def available(self) -> bool:
        return self.reason is None

    def to_dict(self) -> dict:
        out = {"statistic": _clean(self.statistic), "p_value": _clean(self.p_value)}
        if self.df is not None:
            out["df"] = int(self.df)
        if self.reason is not None:
            out["reason"] = self.reason
        return out

    @classmethod
    def from_dict(cls, d: Mapping) -> "TestResult":
        return cls(_float(d["statistic"]), _float(d["p_value"]), d.get("df"), d.get("reason"))


@dataclass(frozen=True)
class Counts:
    observations: int
    units: int
    instruments: int
    periods: int
    transformed_rows: int
    level_rows: int
    parameters: int
    #: time-effect moments left out because the others imply them (system GMM)
    redundant_instruments: int = 0

    @property
    def instruments_per_unit(self) -> float:
        return self.instruments / self.units if self.units else math.inf


@dataclass(frozen=True)
class FitResult:
    """One fitted model.

    ``terms``: coefficient table in estimation order; ``tests``: ``ar1``, ``ar2``,
    ``sargan``, ``hansen`` (None where not defined); ``difference_hansen``: one test
    per instrument group; ``vcov``: the covariance used for the standard errors.
    """

    terms: tuple[TermEstimate, ...]
    std_error_kind: str
    tests: Mapping[str, TestResult | None]
    difference_hansen: Mapping[str, TestResult]
    counts: Counts
    warnings: tuple[str, ...]
    vcov: np.ndarray
    settings: Mapping[str, Any] = field(default_factory=dict)
    diagnostics: Mapping[str, Any] = field(default_factory=dict)
    #: long-run effects ``NAME[long-run]`` (:mod:`.longrun`), derived from ``terms``
    #: and ``vcov``; not part of ``terms`` (``vcov`` is the coefficients' covariance)
    long_run: tuple[TermEstimate, ...] = ()
    #: instrument strength (:mod:`.strength`): ``rank_lm`` and ``rank_wald`` (block →
    #: TestResult; blocks ``system`` and, in system GMM, ``transformed`` and
    #: ``level``) and ``conditional_f`` (term → TestResult whose statistic is the F)
    strength: Mapping[str, Mapping[str, TestResult]] = field(default_factory=dict)

    def __post_init__(self):
        object.__setattr__(self, "strength", MappingProxyType(
            {k: MappingProxyType(dict(v)) for k, v in dict(self.strength).items()}))
        object.__setattr__(self, "long_run", tuple(self.long_run))
        vc = np.array(self.vcov, dtype=float)
        vc.setflags(write=False)
        object.__setattr__(self, "vcov", vc)
        object.__setattr__(self, "tests", MappingProxyType(dict(self.tests)))
        object.__setattr__(self, "difference_hansen", MappingProxyType(dict(self.difference_hansen)))
        object.__setattr__(self, "settings", MappingProxyType(dict(self.settings)))
        object.__setattr__(self, "diagnostics", MappingProxyType(dict(self.diagnostics)))

    @property
    def labels(self) -> tuple[str, ...]:
        return tuple(t.label for t in self.terms)

    @property
    def params(self) -> np.ndarray:
        return np.array([t.estimate for t in self.terms])

    @property
    def std_errors(self) -> np.ndarray:
        return np.array([t.std_error for t in self.terms])

    def term(self, label: str) -> TermEstimate:
        for t in self.terms + self.long_run:
            if t.label == label:
                return t
        raise KeyError(f"no term {label!r}; terms are {', '.join(self.labels)}")

    def to_frame(self) -> pd.DataFrame:
        """Coefficient table: one row per term, then the long-run effects."""
        return pd.DataFrame(
            [(t.label, t.estimate, t.std_error, t.z, t.p_value)
             for t in self.terms + self.long_run],
            columns=["term", "estimate", "std_error", "z", "p_value"],
        ).set_index("term")

    def tests_frame(self) -> pd.DataFrame:
        rows = []
        for name, test in self.tests.items():
            if test is not None:
                rows.append((name, test.statistic, test.df, test.p_value, test.reason or ""))
        for group, test in self.difference_hansen.items():
            rows.append((f"difference-in-Hansen: {group}", test.statistic, test.df, test.p_value,
                         test.reason or ""))
        return pd.DataFrame(rows, columns=["test", "statistic", "df", "p_value", "reason"]
                            ).set_index("test")

    def to_dict(self) -> dict:
        """The one record of this fit, JSON-ready (the JSON of ``robustgmm fit --json``).

        Keys: ``terms`` (label → estimate, std_error, z, p_value, in estimation
        order), ``std_error_kind``, ``tests`` (ar1, ar2, sargan, hansen → statistic,
        p_value, df, or null where the test is not defined; ``difference_hansen``:
        group → test), ``counts``, ``settings``, ``warnings``, ``vcov`` (the K × K
        covariance of the standard errors, rows in term order), ``diagnostics`` and
        ``long_run`` (label → estimate, std_error, z, p_value and, where not defined,
        reason).
        """
        tests = {name: (t.to_dict() if t is not None else None) for name, t in self.tests.items()}
        tests["difference_hansen"] = {g: t.to_dict() for g, t in self.difference_hansen.items()}
        c = self.counts
        return {
            "terms": {t.label: {"estimate": _clean(t.estimate), "std_error": _clean(t.std_error),
                                "z": _clean(t.z), "p_value": _clean(t.p_value)} for t in self.terms},
            "std_error_kind": self.std_error_kind,
            "tests": tests,
            "counts": {"observations": c.observations, "units": c.units,
                       "instruments": c.instruments, "periods": c.periods,
                       "parameters": c.parameters,
                       "redundant_instruments": c.redundant_instruments,
                       "instruments_per_unit": _clean(c.instruments_per_unit),
                       "transformed_rows": c.transformed_rows, "level_rows": c.level_rows},
            "settings": dict(self.settings),
            "warnings": list(self.warnings),
            "long_run": {t.label: _term_dict(t) for t in self.long_run},
            "strength": {k: {name: t.to_dict() for name, t in v.items()}
                         for k, v in self.strength.items()},
            "vcov": _plain(self.vcov),
            "diagnostics": {k: _plain(v) for k, v in self.diagnostics.items()},
        }

    @classmethod
    def from_dict(cls, d: Mapping) -> "FitResult":
        """The fit of a record written by :meth:`to_dict` (``from_dict(r.to_dict())``
        equals ``r``, NaN for NaN)."""
        tests = dict(d["tests"])
        diff = tests.pop("difference_hansen")
        c = d["counts"]
        return cls(
            terms=tuple(TermEstimate(label, _float(t["estimate"]), _float(t["std_error"]),
                                     _float(t["z"]), _float(t["p_value"]))
                        for label, t in d["terms"].items()),
            std_error_kind=d["std_error_kind"],
            tests={k: (None if t is None else TestResult.from_dict(t)) for k, t in tests.items()},
            difference_hansen={g: TestResult.from_dict(t) for g, t in diff.items()},
            counts=Counts(**{f: c[f] for f in Counts.__dataclass_fields__ if f in c}),
            warnings=tuple(d["warnings"]),
            vcov=_array(d["vcov"]) if d["vcov"] else np.zeros((0, 0)),
            settings=d["settings"],
            diagnostics={k: _array(v) for k, v in d["diagnostics"].items()},
            long_run=tuple(TermEstimate(label, _float(t["estimate"]), _float(t["std_error"]),
                                        _float(t["z"]), _float(t["p_value"]), t.get("reason"))
                           for label, t in d.get("long_run", {}).items()),
            strength={k: {name: TestResult.from_dict(t) for name, t in v.items()}
                      for k, v in d.get("strength", {}).items()},
        )


@dataclass(frozen=True)
class FitFailure:
    """The record of a variant that could not be estimated: ``variant`` its id (empty
    outside an audit), ``error_type`` the exception's class name
    (``EstimationError``, ``UnderidentifiedError``, ...), ``reason`` one line."""

    variant: str
    error_type: str
    reason: str

    @classmethod
    def from_exception(cls, exc: BaseException, variant: str = "", *,
                       name_type: bool = False) -> "FitFailure":
        """The failure of ``exc``; ``name_type`` starts the reason with the exception's
        class name (for an exception that is not an estimation failure)."""
        text = " ".join(str(exc).split()) or type(exc).__name__
        if name_type:
            text = f"{type(exc).__name__}: {text}"
        return cls(variant, type(exc).__name__, text)

    def to_dict(self) -> dict:
        return {"variant": self.variant, "error_type": self.error_type, "reason": self.reason}

    @classmethod
    def from_dict(cls, d: Mapping) -> "FitFailure":
        return cls(d["variant"], d["error_type"], d["reason"])

    def to_frame(self) -> pd.DataFrame:
        """The failure as a one-row table indexed by ``variant``."""
        return pd.DataFrame([self.to_dict()], columns=["variant", "error_type", "reason"]
                            ).set_index("variant")
