"""Units never change results (issue 12, item 1).

Rescaling one column of the data by c rescales the coefficients it enters by known
powers of c and leaves everything else (standard errors relative to their
coefficients, z, p-values, every test, the counts, the kept columns, the warnings)
unchanged: GMM is equivariant to linear reparametrisation of the regressors and
instruments (Hansen 1982). Every factorisation and rank decision of the core works
on rescaled matrices, so this holds in floating point too, to 1e-8 relative.
"""
from __future__ import annotations

import numpy as np
import pytest

from helpers_core import sim_spec
from robustgmm.core import fit
from robustgmm.data import panel_from_frame
from robustgmm.simulate import PanelProcess, simulate_panel
from robustgmm.spec import Regressor

REL = 1e-8
FACTORS = [1e-6, 1e-3, 1e5, 1e8]
SPECS = {
    "system-fd-two-step": dict(equations="system", transform="fd", steps=2, time_effects=True),
    "difference-fod-iterated": dict(equations="difference", transform="fod", steps="iterated",
                                    time_effects=True, form="collapsed"),
    "system-fd-one-step": dict(equations="system", transform="fd", steps=1, time_effects=True,
                               regressors=(Regressor("x", (0,), "predetermined"),
                                           Regressor("w", (0, 1), "exogenous"))),
}


def _frame():
    df = simulate_panel(100, 7, PanelProcess(hetero=1.0), seed=31)
    return df[~((df["unit"] % 5 == 0) & (df["period"] == 2003))]  # a gap: unbalanced


def _power(label: str, column: str, outcome: str = "y") -> int:
    """How a coefficient scales when ``column`` is multiplied by c: y enters the
    left side (every coefficient × c) and its own lags (their coefficients free of
    c); a regressor's own coefficients scale by 1/c."""
    name = label.split("[")[0]
    if column == outcome:
        return 0 if name == outcome else 1
    return -1 if name == column else 0


def _close(a, b, what):
    if a is None or b is None:
        assert a is b, what
        return
    a, b = float(a), float(b)
    if np.isnan(a) or np.isnan(b):
        assert np.isnan(a) and np.isnan(b), what
        return
    assert a == pytest.approx(b, rel=REL, abs=1e-300), what


def _compare(res, ref, column, c):
    assert res.labels == ref.labels
    assert res.counts == ref.counts
    assert res.warnings == ref.warnings
    assert res.std_error_kind == ref.std_error_kind
    for t, r in zip(res.terms, ref.terms):
        k = float(c) ** _power(t.label, column)
        _close(t.estimate, r.estimate * k, f"{t.label} estimate")
        _close(t.std_error, r.std_error * k, f"{t.label} std_error")
        _close(t.z, r.z, f"{t.label} z")
        # p-values: the same relative precision as z carries into the tail
        assert t.p_value == pytest.approx(r.p_value, rel=max(REL, REL * r.z ** 2), abs=1e-300)
    for name in ("ar1", "ar2", "sargan", "hansen"):
        a, b = res.tests[name], ref.tests[name]
        assert (a is None) == (b is None)
        if a is not None:
            _close(a.statistic, b.statistic, name)
            _close(a.p_value, b.p_value, name)
            assert a.df == b.df and getattr(a, "reason", None) == getattr(b, "reason", None)
    assert set(res.difference_hansen) == set(ref.difference_hansen)
    for g, a in res.difference_hansen.items():
        b = ref.difference_hansen[g]
        _close(a.statistic, b.statistic, g)
        _close(a.p_value, b.p_value, g)
        assert a.df == b.df and getattr(a, "reason", None) == getattr(b, "reason", None)


@pytest.mark.parametrize("name", sorted(SPECS))
@pytest.mark.parametrize("column", ["y", "x", "w"])
def test_rescaling_a_column_changes_nothing_but_its_coefficients(name, column):
    df = _frame()
    spec = sim_spec(**SPECS[name])
    ref = fit(spec, panel_from_frame(df, "unit", "period", ["y", "x", "w"]))
    for c in FACTORS:
        scaled = df.copy()
        scaled[column] = scaled[column] * c
        res = fit(spec, panel_from_frame(scaled, "unit", "period", ["y", "x", "w"]))
        _compare(res, ref, column, c)


@pytest.mark.parametrize("name", sorted(SPECS))
def test_rescaling_an_extra_instrument_changes_nothing(name):
    # issue 12 item 1 names instruments as well as regressors: an extra exogenous
    # instrument column z (correlated with x) rescaled by c changes no reported number
    df = _frame().copy()
    rng = np.random.default_rng(8)
    df["z"] = df["x"] + rng.normal(size=len(df))
    spec = sim_spec(**SPECS[name], extra_instruments=("z",))
    columns = ["y", "x", "w", "z"]
    ref = fit(spec, panel_from_frame(df, "unit", "period", columns))
    assert any("z" in c.description for c in ref_design(spec, df, columns).z_columns)
    for c in FACTORS:
        scaled = df.copy()
        scaled["z"] = scaled["z"] * c
        _compare(fit(spec, panel_from_frame(scaled, "unit", "period", columns)), ref, "z", c)


def ref_design(spec, df, columns):
    from robustgmm.core.design import Design
    return Design(spec, panel_from_frame(df, "unit", "period", columns))
