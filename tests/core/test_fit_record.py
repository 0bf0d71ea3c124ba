"""FitResult.to_dict() is the one record of a fit (the fit JSON, what a cache stores);
from_dict() reads it back exactly, through real JSON text."""
from __future__ import annotations

import json
import math

import numpy as np
import pytest

from robustgmm.core import fit
from robustgmm.core.results import FitFailure, FitResult
from robustgmm.data import build_panel
from robustgmm.errors import EstimationError, UnderidentifiedError
from robustgmm.simulate import simulate_panel
from robustgmm.spec import Regressor, Spec


def _same(a, b) -> bool:
    """Equal, NaN equal to NaN, arrays element-wise."""
    if isinstance(a, np.ndarray) or isinstance(b, np.ndarray):
        return np.array_equal(np.asarray(a, float), np.asarray(b, float), equal_nan=True)
    if isinstance(a, float) and isinstance(b, float):
        return a == b or (math.isnan(a) and math.isnan(b))
    return a == b


def assert_same_fit(a: FitResult, b: FitResult) -> None:
    assert a.labels == b.labels
    for s, t in zip(a.terms, b.terms):
        for f in ("estimate", "std_error", "z", "p_value"):
            assert _same(getattr(s, f), getattr(t, f)), (s.label, f)
    assert a.std_error_kind == b.std_error_kind
    assert a.tests.keys() == b.tests.keys()
    for k in a.tests:
        if a.tests[k] is None:
            assert b.tests[k] is None
        else:
            assert all(_same(getattr(a.tests[k], f), getattr(b.tests[k], f))
                       for f in ("statistic", "p_value", "df")), k
    assert dict(a.difference_hansen) == dict(b.difference_hansen)
    assert a.counts == b.counts and a.warnings == b.warnings
    assert _same(a.vcov, b.vcov)
    assert [t.label for t in a.long_run] == [t.label for t in b.long_run]
    for s, t in zip(a.long_run, b.long_run):
        assert all(_same(getattr(s, f), getattr(t, f))
                   for f in ("estimate", "std_error", "z", "p_value")) and s.reason == t.reason
    assert a.strength.keys() == b.strength.keys()
    for kind in a.strength:
        assert a.strength[kind].keys() == b.strength[kind].keys()
        for name, t in a.strength[kind].items():
            u = b.strength[kind][name]
            assert all(_same(getattr(t, f), getattr(u, f)) for f in ("statistic", "p_value"))
            assert (t.df, t.reason) == (u.df, u.reason)
    assert json.loads(json.dumps(dict(a.settings))) == dict(b.settings)
    assert a.diagnostics.keys() == b.diagnostics.keys()
    for k in a.diagnostics:
        assert (a.diagnostics[k] is None) == (b.diagnostics[k] is None), k
        if a.diagnostics[k] is not None:
            assert _same(np.asarray(a.diagnostics[k], float), np.asarray(b.diagnostics[k], float)), k


@pytest.fixture(scope="module")
def panel_and_spec():
    spec = Spec(unit="unit", period="period", outcome="y", last_lag=3,
                regressors=(Regressor("x", role="endogenous"), Regressor("w")))
    return build_panel(simulate_panel(150, 7, seed=11), spec), spec


@pytest.mark.parametrize("changes", [
    dict(steps=1), dict(steps=2), dict(steps="iterated"), dict(steps=1, errors="conventional", equations="difference"),
    dict(equations="difference", form="collapsed"), dict(last_lag=2, form="collapsed",
                                                        equations="difference"),
])
def test_round_trip_through_json_is_exact(panel_and_spec, changes):
    import dataclasses
    panel, spec = panel_and_spec
    result = fit(dataclasses.replace(spec, **changes), panel)
    record = json.loads(json.dumps(result.to_dict(), allow_nan=False))  # strict JSON
    assert_same_fit(result, FitResult.from_dict(record))
    # the record's keys are the format's (robustgmm.contract)
    from robustgmm import contract
    assert tuple(record)[:len(contract.FIT_KEYS)] == contract.FIT_KEYS
    assert set(record["tests"]) == set(contract.FIT_TEST_KEYS)
    assert set(contract.FIT_COUNT_KEYS) <= set(record["counts"])


def test_a_test_without_degrees_of_freedom_is_null(panel_and_spec):
    # an exactly identified model has no Hansen test: null in the record, None back
    import dataclasses
    panel, spec = panel_and_spec
    just = dataclasses.replace(spec, regressors=(), equations="difference", form="collapsed",
                               last_lag=2, time_effects=False)
    result = fit(just, panel)
    assert result.counts.instruments == result.counts.parameters
    record = result.to_dict()
    assert record["tests"]["hansen"] is None
    assert FitResult.from_dict(json.loads(json.dumps(record))).tests["hansen"] is None


def test_failures_are_typed_records():
    for exc in (EstimationError("weight matrix is singular"),
                UnderidentifiedError("3 instruments for 4 parameters\nin sample x")):
        failure = FitFailure.from_exception(exc)
        assert failure.error_type == type(exc).__name__
        assert "\n" not in failure.reason and failure.reason
        assert FitFailure.from_dict(json.loads(json.dumps(failure.to_dict()))) == failure
