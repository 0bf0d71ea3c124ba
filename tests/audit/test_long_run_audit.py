"""Long-run effects through an audit: estimates.csv holds NAME[long-run] for every
estimated variant, equal to Σβ/(1 − Σρ) of that variant's own coefficients, and a
long-run focus term gets a verdict like any other (simulated data, robustgmm.simulate)."""
from __future__ import annotations

import pytest

from helpers_audit import make_spec
from robustgmm.audit import audit


def test_long_run_focus_term_through_an_audit(tmp_path):
    spec = make_spec(tmp_path, vary={"form": ["collapsed", "per-period"]},
                     panel_kw={"n_units": 120, "n_periods": 7},
                     audit={"focus": ["x[long-run]"]})
    res = audit(spec, jobs=1)
    est = res.estimates
    ok = res.variants[res.variants.status == "ok"].variant
    assert len(ok) == 2
    for v in ok:
        rows = est[est.variant == v].set_index("term")
        assert rows.index[-2:].tolist() == ["x[long-run]", "w[long-run]"]
        lr = rows.estimate["x[t]"] / (1 - rows.estimate["y[t-1]"])
        assert rows.estimate["x[long-run]"] == pytest.approx(lr, rel=1e-12)
        assert rows.std_error["x[long-run]"] > 0
    term = res.verdict["terms"]["x[long-run]"]
    assert term["verdict"] in ("robust", "fragile", "inconclusive")
    assert term["base"]["estimate"] == pytest.approx(
        est[(est.variant == res.verdict["base_variant"]) & (est.term == "x[long-run]")]
        .estimate.iloc[0])
