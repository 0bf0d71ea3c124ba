"""A Spec checks itself: a misspelt option built in code fails as it would in a model
file (issue 9, problem 1: ``Spec(form="colapsed")`` used to fit per-period
instruments, ``steps=3`` a two-step estimate labelled iterated)."""
from __future__ import annotations

import dataclasses

import pytest

from robustgmm import options
from robustgmm.errors import InputError
from robustgmm.modelfile import spec_from_dict
from robustgmm.spec import Regressor, SampleFilter, Spec, Thresholds, Vary, canonical_settings

BASE = dict(unit="firm", period="year", outcome="y")


def _model(section: str, key: str, value) -> dict:
    d = {"data": {"unit": "firm", "period": "year"}, "model": {"outcome": "y"}}
    d.setdefault(section, {})[key] = value
    return d


@pytest.mark.parametrize("field, value, section, key", [
    ("form", "colapsed", "instruments", "form"),
    ("equations", "sytem", "method", "equations"),
    ("transform", "fdd", "method", "transform"),
    ("errors", "robus", "method", "errors"),
    ("steps", 3, "method", "steps"),
    ("first_lag", 0, "instruments", "first_lag"),
    ("last_lag", 0, "instruments", "last_lag"),
    ("alpha", 1.5, "audit", "alpha"),
])
def test_bad_option_is_the_model_file_message(field, value, section, key):
    with pytest.raises(InputError) as spec_error:
        Spec(**BASE, **{field: value})
    with pytest.raises(InputError) as file_error:
        spec_from_dict(_model(section, key, value))
    (spec_line,), (file_line,) = spec_error.value.problems, file_error.value.problems
    assert spec_line.startswith(f"Spec {field} = ")
    # the same value shown and the same reason: the text after "[section] key"
    assert spec_line.split(f"Spec {field}", 1)[1] == file_line.split(f"] {key}", 1)[1]


def test_misspelt_role_names_field_and_value():
    with pytest.raises(InputError, match=r'^Regressor role = "endogeneous": must be '
                                         r'"endogenous", "predetermined" or "exogenous" '
                                         r'\(did you mean "endogenous"\?\)$'):
        Regressor("x", role="endogeneous")


def test_every_problem_is_listed_at_once():
    with pytest.raises(InputError) as err:
        Spec(**BASE, form="colapsed", equations="sytem", steps=3)
    assert [p.split(" =")[0] for p in err.value.problems] == [
        "Spec equations", "Spec steps", "Spec form"]


def test_replace_checks_too():
    spec = Spec(**BASE)
    with pytest.raises(InputError, match="steps = 3"):
        dataclasses.replace(spec, steps=3)


def test_booleans_are_not_steps():
    with pytest.raises(InputError, match="steps = true"):
        Spec(**BASE, steps=True)


def test_vary_and_thresholds_check_their_values():
    with pytest.raises(InputError, match=r'^Vary form = \["per-period", "colapsed"\]: '
                                         r'"colapsed" is not valid'):
        Vary(form=("per-period", "colapsed"))
    with pytest.raises(InputError, match="^Vary roles"):
        Vary(roles=(("x", ("endogeneous",)),))
    with pytest.raises(InputError, match="^Thresholds hansen_reject = 2.0"):
        Thresholds(hansen_reject=2.0)
    with pytest.raises(InputError, match="^SampleFilter period_from"):
        SampleFilter(period_from="2001")


def test_members_are_stored_as_words_and_ids_do_not_change():
    words = Spec(**BASE, equations="difference", transform="fod", steps="iterated",
                 errors="conventional", form="collapsed",
                 regressors=(Regressor("x", role="endogenous"),))
    members = Spec(**BASE, equations=options.Equations.DIFFERENCE,
                   transform=options.Transform.FOD, steps=options.Steps.ITERATED,
                   errors=options.Errors.CONVENTIONAL, form=options.Form.COLLAPSED,
                   regressors=(Regressor("x", role=options.Role.ENDOGENOUS),))
    assert members == words
    assert type(members.equations) is str and members.steps == "iterated"
    assert canonical_settings(members) == canonical_settings(words)
    assert Spec(**BASE, steps=options.Steps.TWO).steps == 2


def test_lists_become_tuples():
    spec = Spec(**BASE, outcome_lags=[1, 2], focus=["y[t-1]"])
    assert spec.outcome_lags == (1, 2) and spec.focus == ("y[t-1]",)
    hash(spec)  # frozen and hashable, as the grid needs
