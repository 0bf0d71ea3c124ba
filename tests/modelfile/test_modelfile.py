"""Model file reader: schema, defaults, round trip and one-line validation messages.

The expectations here come from the model-file format in docs/formats.md and the
field table in DEVELOPERS.md (our own design, no outside source).
"""
from __future__ import annotations

import copy
import tomllib
from pathlib import Path

import pytest

from robustgmm.errors import InputError
from helpers_toml import spec_to_toml
from robustgmm.modelfile import read_model, spec_from_dict, spec_to_dict
from robustgmm.spec import Regressor, SampleFilter, Spec, Thresholds, Vary

FULL = """\
[data]
file = "firms.csv"
unit = "firm_id"
period = "year"

[model]
outcome = "cash"
outcome_lags = [1, 2]
time_effects = false

[[model.regressors]]
name = "leverage"
lags = [0]
role = "endogenous"

[[model.regressors]]
name = "sales_growth"
lags = [0, 1]
role = "exogenous"

[method]
equations = "difference"
transform = "fod"
steps = "iterated"
errors = "conventional"

[instruments]
first_lag = 3
last_lag = 5
form = "collapsed"
extra = ["rate"]

[sample]
period_from = 1990
period_to = 2010
exclude = {column = "sector", values = [7, "fin"]}

[audit]
focus = ["cash[t-1]", "leverage[t]"]
alpha = 0.1

[audit.thresholds]
hansen_too_high = 0.3
spread_in_se = 1.5

[audit.vary]
equations = ["difference", "system"]
transform = ["fd", "fod"]
steps = [1, 2]
form = ["per-period", "collapsed"]
first_lag = [2, 3]
last_lag = [3, 4, "all"]
time_effects = [true, false]
errors = ["robust"]

[audit.vary.roles]
leverage = ["endogenous", "predetermined"]

[[audit.vary.sample]]
name = "after 2000"
period_from = 2000

[[audit.vary.sample]]
name = "no utilities"
exclude = {column = "sector", values = [4]}
"""

MINIMAL = {"data": {"file": "p.csv", "unit": "id", "period": "year"},
           "model": {"outcome": "y"}}


def write(tmp_path: Path, text: str, name: str = "model.toml") -> Path:
    path = tmp_path / name
    path.write_text(text, encoding="utf-8")
    return path


def problems_of(d, **kw) -> list[str]:
    with pytest.raises(InputError) as info:
        spec_from_dict(d, **kw)
    return info.value.problems


def with_(base: dict, **sections) -> dict:
    d = copy.deepcopy(base)
    for sec, table in sections.items():
        d.setdefault(sec, {}).update(table)
    return d


# -- reading -------------------------------------------------------------------
def test_full_model_file_reads_every_key(tmp_path):
    spec = read_model(write(tmp_path, FULL))
    assert spec.data_file == tmp_path / "firms.csv"
    assert (spec.unit, spec.period, spec.outcome) == ("firm_id", "year", "cash")
    assert spec.outcome_lags == (1, 2) and spec.time_effects is False
    assert spec.regressors == (Regressor("leverage", (0,), "endogenous"),
                               Regressor("sales_growth", (0, 1), "exogenous"))
    assert (spec.equations, spec.transform, spec.steps, spec.errors) == (
        "difference", "fod", "iterated", "conventional")
    assert (spec.first_lag, spec.last_lag, spec.form) == (3, 5, "collapsed")
    assert spec.extra_instruments == ("rate",)
    assert spec.sample.period_from == 1990 and spec.sample.period_to == 2010
    assert spec.sample.exclude_column == "sector"
    assert spec.sample.exclude_values == (7, "fin")
    assert spec.focus == ("cash[t-1]", "leverage[t]") and spec.alpha == 0.1
    assert spec.thresholds == Thresholds(hansen_too_high=0.3, spread_in_se=1.5)
    v = spec.vary
    assert v.equations == ("difference", "system") and v.steps == (1, 2)
    assert v.last_lag == (3, 4, None) and v.time_effects == (True, False)
    assert v.roles == (("leverage", ("endogenous", "predetermined")),)
    assert [s.name for s in v.samples] == ["after 2000", "no utilities"]
    assert v.samples[1].exclude_values == (4,)
    assert spec.source == str(tmp_path / "model.toml")


def test_defaults_match_the_contract():
    spec = spec_from_dict(MINIMAL)
    assert spec == Spec(unit="id", period="year", outcome="y", data_file=Path("p.csv"))
    assert spec.outcome_lags == (1,) and spec.steps == 2 and spec.last_lag is None
    assert spec.sample == SampleFilter() and spec.vary == Vary() and spec.vary.is_empty()


def test_regressor_defaults():
    spec = spec_from_dict(with_(MINIMAL, model={"regressors": [{"name": "x"}]}))
    assert spec.regressors == (Regressor("x", (0,), "exogenous"),)


def test_data_file_is_relative_to_the_model_file(tmp_path):
    sub = tmp_path / "models"
    sub.mkdir()
    spec = read_model(write(sub, FULL))
    assert spec.data_file == sub / "firms.csv"
    # an absolute path stays as written
    absolute = str(tmp_path / "elsewhere.csv")
    spec = spec_from_dict(with_(MINIMAL, data={"file": absolute}), base_dir=sub)
    assert spec.data_file == Path(absolute)


def test_sample_without_name_gets_a_description():
    spec = spec_from_dict(with_(MINIMAL, sample={"period_from": 1980, "period_to": 1990}))
    assert spec.sample.name == "periods 1980-1990"


# -- round trip ----------------------------------------------------------------
def test_round_trip_through_dict_and_toml(tmp_path):
    spec = read_model(write(tmp_path, FULL))
    assert spec_from_dict(spec_to_dict(spec), source=spec.source) == spec
    assert spec.to_dict() == spec_to_dict(spec)
    again = read_model(write(tmp_path, spec_to_toml(spec), "again.toml"))
    assert again == Spec(**{**spec.__dict__, "source": str(tmp_path / "again.toml")})
    plain = spec_from_dict(MINIMAL)
    assert spec_from_dict(spec_to_dict(plain)) == plain


# -- syntax and file errors ----------------------------------------------------
def test_toml_syntax_error_names_the_line(tmp_path):
    path = write(tmp_path, '[data]\nunit = "id"\nperiod = \n')
    with pytest.raises(InputError) as info:
        read_model(path)
    (line,) = info.value.problems
    assert line.startswith(f"{path}: line 3") and "TOML syntax error" in line


def test_missing_and_non_utf8_model_files(tmp_path):
    with pytest.raises(InputError, match="model file not found"):
        read_model(tmp_path / "nope.toml")
    path = tmp_path / "latin.toml"
    path.write_bytes('[data]\nunit = "caf\u00e9"\n'.encode("latin-1"))
    with pytest.raises(InputError, match="line 2: not UTF-8"):
        read_model(path)
    with pytest.raises(InputError, match="is a folder"):
        read_model(tmp_path)


# -- validation messages ---------------------------------------------------------
CASES = [
    # (description, dict edits, expected fragments of one problem line)
    ("misspelt section", {"methd": {"steps": 2}}, ["[methd]", 'did you mean [method]']),
    ("misspelt key", {"method": {"stpes": 2}}, ["[method] stpes", 'did you mean "steps"']),
    ("key in the wrong section", {"model": {"first_lag": 2}},
     ["[model] first_lag", "belongs in [instruments]"]),
    ("steps 3", {"method": {"steps": 3}}, ['[method] steps = 3: must be 1, 2 or "iterated"']),
    ("steps as text", {"method": {"steps": "2"}}, ['[method] steps = "2"', "without quotes"]),
    ("bad equations", {"method": {"equations": "sytem"}},
     ['[method] equations = "sytem"', 'did you mean "system"']),
    ("bad transform", {"method": {"transform": "fdd"}}, ["[method] transform", '"fod"']),
    ("bad errors", {"method": {"errors": "cluster"}}, ["[method] errors", '"robust"']),
    ("bad form", {"instruments": {"form": "collapse"}},
     ['[instruments] form = "collapse"', 'did you mean "collapsed"']),
    ("first_lag 0", {"instruments": {"first_lag": 0}}, ["[instruments] first_lag = 0", "1 or more"]),
    ("first_lag float", {"instruments": {"first_lag": 2.5}}, ["[instruments] first_lag = 2.5"]),
    ("last_lag below first_lag", {"instruments": {"first_lag": 3, "last_lag": 2}},
     ["[instruments] last_lag = 2", "below first_lag = 3"]),
    ("last_lag text", {"instruments": {"last_lag": "al"}}, ['last_lag = "al"', 'did you mean "all"']),
    ("empty outcome lags", {"model": {"outcome_lags": []}},
     ["[model] outcome_lags = []", "at least one lag"]),
    ("outcome lag 0", {"model": {"outcome_lags": [0]}}, ["[model] outcome_lags = [0]", "below 1"]),
    ("negative regressor lag", {"model": {"regressors": [{"name": "x", "lags": [-1]}]}},
     ["#1 (x) lags = [-1]", "negative"]),
    ("repeated lag", {"model": {"regressors": [{"name": "x", "lags": [1, 1]}]}},
     ["#1 (x) lags", "listed twice"]),
    ("bad role", {"model": {"regressors": [{"name": "x", "role": "endog"}]}},
     ['#1 (x) role = "endog"', 'did you mean "endogenous"']),
    ("regressor without name", {"model": {"regressors": [{"lags": [0]}]}},
     ["[[model.regressors]] #1 name: is missing"]),
    ("duplicate regressor", {"model": {"regressors": [{"name": "x"}, {"name": "x", "lags": [1]}]}},
     ['#2 (x) name = "x"', "duplicate regressor"]),
    ("outcome as regressor", {"model": {"regressors": [{"name": "y"}]}},
     ['#1 (y) name = "y"', "is the outcome"]),
    ("outcome is the unit column", {"model": {"outcome": "id"}}, ['[model] outcome = "id"', "unit"]),
    ("reserved name", {"model": {"regressors": [{"name": "period"}]}}, ['"period" is reserved']),
    ("time_effects text", {"model": {"time_effects": "yes"}},
     ['[model] time_effects = "yes": must be true or false']),
    ("missing outcome", {"model": {"outcome_lags": [1], "outcome": None}},
     ["[model] outcome: is missing (required)"]),
    ("unit equals period", {"data": {"period": "id"}}, ['[data] period = "id"', "same column"]),
    ("unsupported data file", {"data": {"file": "p.sav"}},
     ['[data] file = "p.sav"', "unsupported file type .sav"]),
    ("extra is a model variable", {"instruments": {"extra": ["y"]}},
     ['[instruments] extra = ["y"]', '"y" is already a model variable']),
    ("alpha 0", {"audit": {"alpha": 0}}, ["[audit] alpha = 0", "between 0 and 1"]),
    ("alpha 1.5", {"audit": {"alpha": 1.5}}, ["[audit] alpha = 1.5"]),
    ("focus typo", {"audit": {"focus": ["y[t-2]"]}},
     ['[audit] focus = ["y[t-2]"]', '"y[t-2]" is not a term', 'did you mean "y[t-1]"']),
    ("focus on a dummy", {"audit": {"focus": ["period[1990]"]}},
     ['"period[1990]": the constant and period dummies cannot be focus terms']),
    ("focus repeated", {"audit": {"focus": ["y[t-1]", "y[t-1]"]}}, ['"y[t-1]" is listed twice']),
    ("vary empty list", {"audit": {"vary": {"steps": []}}},
     ["[audit.vary] steps = []", "lists no values"]),
    ("vary bad value", {"audit": {"vary": {"form": ["collapsed", "stacked"]}}},
     ['[audit.vary] form = ["collapsed", "stacked"]', '"stacked" is not valid']),
    ("vary not a list", {"audit": {"vary": {"transform": "fod"}}},
     ['[audit.vary] transform = "fod"', "must be a list"]),
    ("vary unknown key", {"audit": {"vary": {"lag_limit": [2]}}},
     ["[audit.vary] lag_limit", "unknown key"]),
    ("vary last_lag unreachable", {"audit": {"vary": {"last_lag": [1, "all"]}}},
     ["[audit.vary] last_lag", "1 is below every first_lag tried (2)"]),
    ("vary roles unknown regressor",
     {"model": {"regressors": [{"name": "lev"}]}, "audit": {"vary": {"roles": {"levv": ["exogenous"]}}}},
     ["[audit.vary.roles] levv", 'did you mean "lev"']),
    ("vary roles bad role",
     {"model": {"regressors": [{"name": "lev"}]}, "audit": {"vary": {"roles": {"lev": ["weird"]}}}},
     ["[audit.vary.roles] lev", '"weird" is not valid']),
    ("vary sample repeats base", {"audit": {"vary": {"sample": [{"name": "again"}]}}},
     ["[[audit.vary.sample]] #1 (again)", "same restrictions as the base sample"]),
    ("vary sample duplicate names",
     {"audit": {"vary": {"sample": [{"name": "a", "period_from": 1}, {"name": "a", "period_to": 9}]}}},
     ['#2 (a) name = "a"', "distinct name"]),
    ("sample backwards", {"sample": {"period_from": 2000, "period_to": 1990}},
     ["[sample] period_from = 2000, period_to = 1990", "must not be before"]),
    ("sample exclude without values", {"sample": {"exclude": {"column": "sector"}}},
     ["[sample] exclude values: is missing"]),
    ("sample exclude empty values", {"sample": {"exclude": {"column": "s", "values": []}}},
     ["[sample] exclude values = []", "at least one value"]),
    ("threshold out of range", {"audit": {"thresholds": {"hansen_reject": 5}}},
     ["[audit.thresholds] hansen_reject = 5"]),
    ("threshold misspelt", {"audit": {"thresholds": {"hansen_too_hi": 0.3}}},
     ["[audit.thresholds] hansen_too_hi", 'did you mean "hansen_too_high"']),
    ("section is a value", {"method": None, "method_value": "system"}, ["[method]", "must be a table"]),
]


def _apply(edits: dict) -> dict:
    d = copy.deepcopy(MINIMAL)
    for sec, table in edits.items():
        if sec == "method_value":
            d["method"] = table
            continue
        if table is None:
            continue
        target = d.setdefault(sec, {})
        for key, value in table.items():
            if value is None:
                target.pop(key, None)
            else:
                target[key] = value
    return d


@pytest.mark.parametrize("label,edits,fragments", CASES, ids=[c[0] for c in CASES])
def test_each_problem_is_one_line_naming_its_key(label, edits, fragments):
    lines = problems_of(_apply(edits), source="m.toml")
    assert all(line.startswith("m.toml: ") and "\n" not in line for line in lines)
    assert any(all(f in line for f in fragments) for line in lines), lines


def test_all_problems_are_collected_at_once(tmp_path):
    text = FULL.replace('steps = "iterated"', "steps = 3").replace(
        'role = "endogenous"', 'role = "endo"').replace("alpha = 0.1", "alpha = 2")
    with pytest.raises(InputError) as info:
        read_model(write(tmp_path, text))
    found = "\n".join(info.value.problems)
    assert len(info.value.problems) == 3
    for key in ("steps = 3", 'role = "endo"', "alpha = 2"):
        assert key in found


def test_not_a_table():
    assert problems_of(["data"]) == ["<dict>: model: must be a table of sections ([data], [model], ...)"]


def test_model_file_is_data_not_code(tmp_path):
    # a value that looks like code stays a string and fails as an unknown column later;
    # nothing in the file is evaluated (issue 6, Safety)
    spec = spec_from_dict(with_(MINIMAL, model={"outcome": "__import__('os').getcwd()"}))
    assert spec.outcome == "__import__('os').getcwd()"
