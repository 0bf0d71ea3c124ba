"""Immutable results of one estimation, convertible to pandas and to the contract JSON."""
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


@dataclass(frozen=True)
class TermEstimate:
    label: str
    estimate: float
    std_error: float
    z: float
    p_value: float


@dataclass(frozen=True)
class TestResult:
    statistic: float
    p_value: float
    df: int | None = None

    def to_dict(self) -> dict:
        out = {"statistic": _clean(self.statistic), "p_value": _clean(self.p_value)}
        if self.df is not None:
            out["df"] = int(self.df)
        return out


@dataclass(frozen=True)
class Counts:
    observations: int
    units: int
    instruments: int
    periods: int
    transformed_rows: int
    level_rows: int
    parameters: int

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

    def __post_init__(self):
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
        for t in self.terms:
            if t.label == label:
                return t
        raise KeyError(f"no term {label!r}; terms are {', '.join(self.labels)}")

    def to_frame(self) -> pd.DataFrame:
        """Coefficient table: one row per term."""
        return pd.DataFrame(
            [(t.label, t.estimate, t.std_error, t.z, t.p_value) for t in self.terms],
            columns=["term", "estimate", "std_error", "z", "p_value"],
        ).set_index("term")

    def tests_frame(self) -> pd.DataFrame:
        rows = []
        for name, test in self.tests.items():
            if test is not None:
                rows.append((name, test.statistic, test.df, test.p_value))
        for group, test in self.difference_hansen.items():
            rows.append((f"difference-in-Hansen: {group}", test.statistic, test.df, test.p_value))
        return pd.DataFrame(rows, columns=["test", "statistic", "df", "p_value"]).set_index("test")

    def to_dict(self) -> dict:
        """The JSON of ``robustgmm fit --json`` (design contract), plus warnings."""
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
                       "instruments_per_unit": _clean(c.instruments_per_unit)},
            "settings": dict(self.settings),
            "warnings": list(self.warnings),
        }
