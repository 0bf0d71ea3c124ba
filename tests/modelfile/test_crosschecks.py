"""Cross-checks ask whether the key paths they depend on parsed (issue 9, problem 6):
a bad value is reported once and neither hides an unrelated problem nor invents one."""
from __future__ import annotations

import copy

import pytest

from robustgmm.errors import InputError
from robustgmm.modelfile import spec_from_dict
from robustgmm.modelfile.schema import SCHEMA, SECTIONS, Key

BASE = {"data": {"unit": "u", "period": "t"},
        "model": {"outcome": "y", "regressors": [{"name": "x"}]}}


def problems(**sections) -> list[str]:
    d = copy.deepcopy(BASE)
    for section, table in sections.items():
        d.setdefault(section, {}).update(table)
    with pytest.raises(InputError) as err:
        spec_from_dict(d)
    return [p.removeprefix("<dict>: ") for p in err.value.problems]


def test_a_bad_sample_name_does_not_hide_a_bad_focus_term():
    found = problems(sample={"name": ""}, audit={"focus": ["z[t]"]})
    assert found == ['[sample] name = "": must not be empty',
                     '[audit] focus = ["z[t]"]: "z[t]" is not a term of the model '
                     '(did you mean "x[t]"?); terms: y[t-1], x[t]']


def test_a_bad_regressor_role_does_not_hide_a_bad_focus_term():
    d = copy.deepcopy(BASE)
    d["model"]["regressors"][0]["role"] = "endogeneous"
    d["audit"] = {"focus": ["z[t]"]}
    with pytest.raises(InputError) as err:
        spec_from_dict(d)
    assert len(err.value.problems) == 2 and "is not a term of the model" in err.value.problems[1]


def test_a_bad_regressor_name_skips_the_focus_check():
    # the labels are unknown, so no focus term can be judged
    d = copy.deepcopy(BASE)
    d["model"]["regressors"][0]["name"] = ""
    d["audit"] = {"focus": ["x[t]"]}
    with pytest.raises(InputError) as err:
        spec_from_dict(d)
    assert err.value.problems == [
        '<dict>: [[model.regressors]] #1 ("") name = "": must not be empty']


def test_a_bad_period_from_of_a_varied_sample_is_not_called_a_repeat():
    found = problems(audit={"vary": {"sample": [{"name": "late", "period_from": "2001"}]}})
    assert found == ['[[audit.vary.sample]] #1 (late) period_from = "2001": must be a whole '
                     'number (a period of the data)']


def test_a_bad_period_from_of_the_base_sample_is_not_called_a_repeat():
    found = problems(sample={"period_from": "2001"},
                     audit={"vary": {"sample": [{"name": "late"}]}})
    assert found == ['[sample] period_from = "2001": must be a whole number (a period of the data)']


def test_a_true_repeat_is_still_found():
    found = problems(sample={"name": "base", "period_from": 2001},
                     audit={"vary": {"sample": [{"name": "late", "period_from": 2001}]}})
    assert found == ["[[audit.vary.sample]] #1 (late): has the same restrictions as the base "
                     "sample; it would repeat it"]


def test_a_bad_first_lag_does_not_invent_an_empty_window():
    # first_lag = 0 falls back to the default 2; last_lag = 1 must not be judged against it
    found = problems(instruments={"first_lag": 0, "last_lag": 1})
    assert len(found) == 1 and found[0].startswith("[instruments] first_lag = 0:")


def test_the_schema_is_one_table_keyed_by_full_path():
    assert SCHEMA[("instruments", "form")].field == "form"
    assert SCHEMA[("method", "steps")].check(2) == 2
    assert all(isinstance(k, tuple) and len(k) == 2 for k in SCHEMA)
    # the sections of the messages are the schema's
    assert set(SECTIONS) == {s for s, _ in SCHEMA}
    # scalar keys, except the [[instruments.gmm]] array of tables
    assert all(isinstance(v, Key) for k, v in SCHEMA.items()
               if k[0] in ("method", "instruments") and k != ("instruments", "gmm"))


def test_long_run_focus_term_needs_a_regressor():
    """`NAME[long-run]` is a focus term for a regressor of the model; for anything
    else (the outcome, a misspelt name) a one-line error names it."""
    d = copy.deepcopy(BASE)
    d["audit"] = {"focus": ["x[long-run]"]}
    assert spec_from_dict(d).focus == ("x[long-run]",)
    found = problems(audit={"focus": ["xx[long-run]", "y[long-run]"]})
    assert found[0].startswith('[audit] focus = ["xx[long-run]", "y[long-run]"]: '
                               '"xx[long-run]": a long-run effect needs a regressor of the '
                               'model, and "xx" is not one (did you mean "x[long-run]"?)')
    assert '"y" is not one' in found[1] and len(found) == 2
