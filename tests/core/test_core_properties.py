"""Property tests of the design: closed-form instrument counts, row-order
independence, and the rows a gap removes."""
from __future__ import annotations

import dataclasses

import numpy as np
import pytest
from hypothesis import given, settings, strategies as st

from helpers_core import sim_panel, sim_spec
from robustgmm.core import count_instruments, estimation_sample, fit
from robustgmm.data import panel_from_frame
from robustgmm.simulate import simulate_panel


def closed_form_count(T, first, last, form, equations):
    """Instruments of y_t = rho y_{t-1} + e with periods 1..T (balanced).

    Transformed rows t = 3..T use levels y_{t-l} for l in [first, min(last, t-1)]
    (per-period: one column each; collapsed: one column per lag). The level equation
    (rows t = 3..T) adds Δy_{t-first+1} (per-period: one per row where it exists;
    collapsed: one) and the constant.
    """
    last = T if last is None else last
    if form == "per-period":
        n = sum(max(0, min(last, t - 1) - first + 1) for t in range(3, T + 1))
    else:
        n = max(0, min(last, T - 1) - first + 1)
    if equations == "system":
        rows = [t for t in range(3, T + 1) if t - first + 1 >= 2]
        n += (len(rows) if form == "per-period" else int(bool(rows))) + 1
    return n


@settings(max_examples=40, deadline=None)
@given(T=st.integers(4, 9), first=st.integers(2, 4), width=st.one_of(st.none(), st.integers(0, 4)),
       form=st.sampled_from(["per-period", "collapsed"]),
       equations=st.sampled_from(["difference", "system"]),
       transform=st.sampled_from(["fd", "fod"]))
def test_instrument_count_closed_form(T, first, width, form, equations, transform):
    last = None if width is None else first + width
    df = simulate_panel(30, T, seed=T)
    panel = panel_from_frame(df, "unit", "period", ["y"])
    spec = sim_spec(regressors=(), equations=equations, transform=transform, form=form,
                    first_lag=first, last_lag=last, time_effects=False)
    expected = closed_form_count(T, first, last, form, equations)
    if expected == 0 or (equations == "system" and expected == 1):
        return  # no lagged-level instruments at all: not a model anyone fits
    assert count_instruments(spec, panel) == expected


_ORDER_DF, _ORDER_PANEL = sim_panel(60, 6, seed=21)


@settings(max_examples=10, deadline=None)
@given(seed=st.integers(0, 2**31 - 1), drop=st.integers(0, 30))
def test_results_do_not_depend_on_row_order(seed, drop):
    df = _ORDER_DF.drop(index=drop * 7)  # also on an unbalanced panel (one row gone)
    panel = panel_from_frame(df, "unit", "period", ["y", "x", "w"])
    spec = sim_spec(time_effects=True)
    shuffled = df.sample(frac=1.0, random_state=seed).reset_index(drop=True)
    panel2 = panel_from_frame(shuffled, "unit", "period", ["y", "x", "w"])
    a, b = fit(spec, panel), fit(spec, panel2)
    assert panel.data_hash == panel2.data_hash
    np.testing.assert_array_equal(a.params, b.params)
    np.testing.assert_array_equal(a.std_errors, b.std_errors)


def test_a_gap_removes_exactly_the_affected_rows():
    df, _ = sim_panel(20, 8, seed=2)
    spec = sim_spec(regressors=(), equations="difference", time_effects=False)
    full = panel_from_frame(df, "unit", "period", ["y"])
    gap = df[~((df.unit == 1) & (df.period == 2005))]  # periods 2001..2008; drop the 5th
    holed = panel_from_frame(gap, "unit", "period", ["y"])
    a, b = fit(spec, full), fit(spec, holed)
    # unit 1 complete periods: 2002-2004 and 2007-2008 (2006 needs y_2005);
    # first differences need t and t-1 complete: 2003, 2004, 2008 — 3 of its 6 rows remain
    assert a.counts.observations - b.counts.observations == 3
    mask = estimation_sample(spec, holed)
    assert mask[0].tolist() == [False, True, True, True, False, False, True, True]


@pytest.mark.parametrize("chunk", [1, 7, 60, 1000])
def test_chunking_does_not_change_results(chunk):
    """Sums over chunks of units equal the one-chunk sums (to rounding)."""
    _, panel = sim_panel(60, 6, seed=8)
    spec = sim_spec(time_effects=True, steps=2)
    ref = fit(spec, panel, chunk_units=panel.n_units)
    res = fit(spec, panel, chunk_units=chunk)
    np.testing.assert_allclose(res.params, ref.params, rtol=1e-10, atol=1e-12)
    np.testing.assert_allclose(res.std_errors, ref.std_errors, rtol=1e-10, atol=1e-12)
    for name in ("ar1", "ar2", "sargan", "hansen"):
        assert res.tests[name].statistic == pytest.approx(ref.tests[name].statistic, rel=1e-9, abs=1e-10, nan_ok=True)
