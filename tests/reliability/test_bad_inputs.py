"""Catalogue of bad inputs run through the command line (issue 6, "Bad input").

Every case goes through ``robustgmm.cli.main([...])`` and must give exit code 2, no
traceback, only ``robustgmm: error:`` lines on stderr, and a message that names the
culprit (the key, column, value or path). The expectations are our own rules
(README "Outputs": exit codes; one line per problem); the data is a small invented panel.
"""
from __future__ import annotations

from dataclasses import dataclass
from pathlib import Path
from typing import Callable

import numpy as np
import pandas as pd
import pytest

from helpers_audit import write_frame
from robustgmm.cli import main
from robustgmm.simulate import PanelProcess, simulate_panel

GOOD_MODEL = """\
[data]
file = "panel.csv"
unit = "firm"
period = "year"

[model]
outcome = "y"
outcome_lags = [1]
time_effects = true

[[model.regressors]]
name = "x"
lags = [0, 1]
role = "endogenous"

[method]
equations = "system"
transform = "fd"
steps = 2

[instruments]
first_lag = 2
last_lag = 3
form = "collapsed"

[audit]
focus = ["y[t-1]", "x[t]"]

[audit.vary]
equations = ["difference", "system"]
"""


def good_frame(n=60, periods=7, seed=0) -> pd.DataFrame:
    """An invented AR(1) panel (robustgmm.simulate): y = 0.5 y[t-1] + x + firm effect
    + noise, x exogenous, a sector per firm and an extra instrument z = x + noise."""
    process = PanelProcess(rho=0.5, beta=1.0, gamma=0.0, rho_x=0.0, tau=0.3, theta=0.0)
    frame = simulate_panel(n, periods, process, seed=seed).drop(columns="w")
    frame = frame.rename(columns={"unit": "firm", "period": "year"})
    frame["sector"] = (frame["firm"] - 1) % 3
    frame["z"] = frame["x"] + np.random.default_rng(seed + 1).normal(size=len(frame))
    return frame


@dataclass
class Case:
    name: str
    setup: Callable[[Path], list]   # writes files into tmp_path, returns the argv
    culprit: tuple[str, ...]        # fragments the message must contain


def model_case(name, edit, *culprit, command="fit"):
    """A case whose model file is GOOD_MODEL transformed by ``edit`` (str -> str)."""
    def setup(tmp: Path):
        good_frame().to_csv(tmp / "panel.csv", index=False)
        (tmp / "model.toml").write_text(edit(GOOD_MODEL), encoding="utf-8")
        argv = [command, tmp / "model.toml"]
        return argv + (["--out", tmp / "out"] if command == "audit" else [])
    return Case(name, setup, culprit)


def data_case(name, mutate, *culprit, ext=".csv", model_edit=lambda m: m):
    """A case whose data file is the good panel transformed by ``mutate``."""
    def setup(tmp: Path):
        frame = mutate(good_frame())
        path = tmp / f"panel{ext}"
        if isinstance(frame, (bytes, str)):
            (path.write_bytes if isinstance(frame, bytes) else path.write_text)(frame)
        else:
            write_frame(frame, path)
        model = model_edit(GOOD_MODEL).replace('"panel.csv"', f'"panel{ext}"')
        (tmp / "model.toml").write_text(model)
        return ["fit", tmp / "model.toml"]
    return Case(name, setup, culprit)


def cli_case(name, argv_of, *culprit):
    def setup(tmp: Path):
        good_frame().to_csv(tmp / "panel.csv", index=False)
        (tmp / "model.toml").write_text(GOOD_MODEL)
        return argv_of(tmp)
    return Case(name, setup, culprit)


def sub(old, new):
    return lambda text: text.replace(old, new, 1)


def add(block):
    return lambda text: text + "\n" + block + "\n"


def at(df, col, row, value):
    df = df.copy()
    if isinstance(value, str):
        df[col] = df[col].astype(object)
    elif isinstance(value, float):
        df[col] = df[col].astype(float)
    df.loc[row, col] = value
    return df


MODEL_CASES = [
    model_case("toml syntax error", sub('steps = 2', 'steps = = 2'), "line 19", "TOML syntax error"),
    model_case("unterminated string", sub('"panel.csv"', '"panel.csv'), "line 2", "TOML syntax error"),
    model_case("misspelt key", sub("steps = 2", "setps = 2"), "[method] setps", 'did you mean "steps"'),
    model_case("misspelt section", sub("[instruments]", "[instrument]"), "[instrument]", "[instruments]"),
    model_case("key in wrong section", sub("steps = 2", "steps = 2\nform = \"collapsed\""),
               "[method] form", "belongs in [instruments]"),
    model_case("steps out of range", sub("steps = 2", "steps = 3"),
               '[method] steps = 3: must be 1, 2 or "iterated"'),
    model_case("steps quoted", sub("steps = 2", 'steps = "two"'), '[method] steps = "two"'),
    model_case("equations invalid", sub('equations = "system"', 'equations = "levels"'),
               '[method] equations = "levels"'),
    model_case("transform invalid", sub('transform = "fd"', 'transform = "within"'),
               '[method] transform = "within"'),
    model_case("form invalid", sub('form = "collapsed"', 'form = "collapse"'),
               '[instruments] form = "collapse"', 'did you mean "collapsed"'),
    model_case("role invalid", sub('role = "endogenous"', 'role = "instrumented"'),
               '(x) role = "instrumented"'),
    model_case("negative lag", sub("lags = [0, 1]", "lags = [0, -1]"), "(x) lags = [0, -1]", "negative"),
    model_case("lags not a list", sub("lags = [0, 1]", "lags = 1"), "(x) lags = 1", "must be a list"),
    model_case("first_lag zero", sub("first_lag = 2", "first_lag = 0"), "[instruments] first_lag = 0"),
    model_case("last_lag below first_lag", sub("last_lag = 3", "last_lag = 1"),
               "[instruments] last_lag = 1", "below first_lag = 2"),
    model_case("no outcome lags", sub("outcome_lags = [1]", "outcome_lags = []"),
               "[model] outcome_lags = []"),
    model_case("outcome as regressor", sub('name = "x"', 'name = "y"'), '(y) name = "y"', "is the outcome"),
    model_case("duplicate regressor", add('[[model.regressors]]\nname = "x"\nlags = [2]'),
               '#2 (x) name = "x"', "duplicate regressor"),
    model_case("missing outcome", sub('outcome = "y"\n', ""), "[model] outcome: is missing"),
    model_case("time_effects not boolean", sub("time_effects = true", 'time_effects = "yes"'),
               '[model] time_effects = "yes"'),
    model_case("alpha out of range", sub('focus = ["y[t-1]", "x[t]"]',
                                         'focus = ["y[t-1]", "x[t]"]\nalpha = 5'),
               "[audit] alpha = 5"),
    model_case("focus term absent", sub('"x[t]"]', '"x[t-2]"]'), '"x[t-2]" is not a term',
               'did you mean'),
    model_case("empty vary list", sub('equations = ["difference", "system"]', "steps = []"),
               "[audit.vary] steps = []", "lists no values"),
    model_case("vary invalid value", sub('equations = ["difference", "system"]',
                                         'transform = ["fd", "orthogonal"]'),
               '[audit.vary] transform', '"orthogonal" is not valid'),
    model_case("contradictory vary lags", sub('equations = ["difference", "system"]',
                                              "last_lag = [1]"),
               "[audit.vary] last_lag", "below every first_lag tried", command="audit"),
    model_case("vary roles for unknown regressor", add('[audit.vary.roles]\nxx = ["exogenous"]'),
               "[audit.vary.roles] xx", 'did you mean "x"', command="audit"),
    model_case("vary sample backwards", add('[[audit.vary.sample]]\nname = "late"\n'
                                            "period_from = 2005\nperiod_to = 2003"),
               "[[audit.vary.sample]] #1 (late) period_from = 2005, period_to = 2003"),
    model_case("threshold out of range", add("[audit.thresholds]\nhansen_too_high = 1.5"),
               "[audit.thresholds] hansen_too_high = 1.5"),
    model_case("extra instrument is the outcome", sub('form = "collapsed"', 'form = "collapsed"\nextra = ["y"]'),
               '[instruments] extra = ["y"]'),
    model_case("unsupported data type", sub('"panel.csv"', '"panel.sav"'),
               '[data] file = "panel.sav"', "unsupported file type .sav"),
    model_case("sample period not a number", add('[sample]\nperiod_from = "2003"'),
               '[sample] period_from = "2003"', "must be a whole number"),
    model_case("sample exclude without values", add('[sample]\nexclude = {column = "sector"}'),
               "[sample] exclude values: is missing"),
    model_case("unit equals period", sub('period = "year"', 'period = "firm"'),
               '[data] period = "firm"', "same column as [data] unit"),
    model_case("label for a term the model does not have",
               add('[labels]\n"q[t]" = "Leverage"'), "[labels] q[t]", "not a term of the model"),
    model_case("empty label", add('[labels]\n"x[t]" = ""'), '[labels] x[t] = ""', "non-empty text"),
    model_case("report stars not true or false", add('[report]\nstars = "yes"'),
               '[report] stars = "yes"', "must be true or false"),
    model_case("run scheduler not an address", add('[run]\nscheduler = "login1"'),
               '[run] scheduler = "login1"', "tcp://HOST:PORT", command="audit"),
    model_case("simulate initial not a word", add('[simulate]\ninitial = "burn"'),
               '[simulate] initial = "burn"', "'stationary', 'data'", command="audit"),
    model_case("simulate heteroskedastic not true or false",
               add('[simulate]\nheteroskedastic = 1'), '[simulate] heteroskedastic = 1',
               "must be true or false", command="audit"),
    model_case("simulate truth not a number", add('[simulate.truth]\n"x[t]" = "big"'),
               '[simulate.truth] x[t] = "big"', "finite number", command="audit"),
]

DATA_CASES = [
    data_case("data file missing", lambda d: d, "missing.csv", "data file not found",
              model_edit=sub('"panel.csv"', '"missing.csv"')),
    data_case("empty data file", lambda d: b"", "panel.csv", "empty"),
    data_case("header only", lambda d: "firm,year,y,x\n", "panel.csv", "no rows"),
    data_case("corrupt parquet", lambda d: b"PAR1 this is not parquet", "panel.parquet",
              "cannot read as parquet", ext=".parquet"),
    data_case("missing column with suggestion", lambda d: d.rename(columns={"x": "X"}),
              "column 'x' not found", "did you mean 'X'"),
    data_case("duplicate unit-period rows", lambda d: pd.concat([d, d.iloc[[10]]]),
              "duplicate firm-year rows", "firm=2, year=2004"),
    data_case("text in numeric column", lambda d: at(d, "x", 5, "12,5"), "column 'x'", "'12,5'", "line 7"),
    data_case("infinite value", lambda d: at(d, "y", 8, np.inf), "column 'y'", "infinite", "line 10"),
    data_case("non-integer period", lambda d: at(d, "year", 3, 2004.5), "period column 'year'", "2004.5"),
    data_case("text period", lambda d: at(d, "year", 3, "2004Q1"), "period column 'year'", "'2004Q1'"),
    data_case("missing period", lambda d: at(d, "year", 4, np.nan), "period column 'year' is empty", "line 6"),
    data_case("missing unit id", lambda d: at(d, "firm", 4, np.nan), "unit column 'firm' is empty", "line 6"),
    data_case("single period", lambda d: d[d["year"] == 2003], "only one period (2003)"),
    data_case("too few periods for the lags", lambda d: d[d["year"] <= 2003],
              "3 periods (2001-2003) are too few", "at least 4",
              model_edit=sub("outcome_lags = [1]", "outcome_lags = [1, 2]")),
    data_case("all-missing used column", lambda d: d.assign(x=np.nan), "column 'x' is missing in every row"),
    data_case("year-month periods", lambda d: d.assign(year=d["year"] * 100 + 1),
              "period column 'year' looks like year-month codes"),
    data_case("sample leaves no rows", lambda d: d, "sample 'future' leaves no rows",
              model_edit=add('[sample]\nname = "future"\nperiod_from = 2050')),
    data_case("excluded value never occurs", lambda d: d, "column 'sector'", "none of the excluded values 9",
              model_edit=add('[sample]\nexclude = {column = "sector", values = [9]}')),
    data_case("filter column missing", lambda d: d.drop(columns="sector"), "column 'sector' not found",
              model_edit=add('[sample]\nexclude = {column = "sector", values = [1]}')),
    # estimation-level data problems (robustgmm.core raises EstimationError -> exit 2)
    data_case("perfectly collinear regressors", lambda d: d.assign(z=2 * d["x"]),
              "cannot estimate the model", "z[t]",
              model_edit=add('[[model.regressors]]\nname = "z"\nlags = [0, 1]\nrole = "endogenous"')),
]

def _dup_header(ext):
    """The good panel with a second column named ``x`` (written raw: pandas would
    rename it ``x.1`` on reading)."""
    def setup(tmp: Path):
        frame = good_frame()
        frame.insert(len(frame.columns), "x_again", frame["x"] + 1.0)
        names = [*frame.columns[:-1], "x"]
        path = tmp / f"panel{ext}"
        if ext == ".csv":
            path.write_text(",".join(names) + "\n" + frame.to_csv(index=False, header=False))
        elif ext == ".xlsx":
            frame.set_axis(names, axis=1).to_excel(path, index=False)
        else:
            import pyarrow as pa
            import pyarrow.parquet as pq
            pq.write_table(pa.table([pa.array(frame[c]) for c in frame.columns], names=names),
                           path)
        (tmp / "model.toml").write_text(GOOD_MODEL.replace('"panel.csv"', f'"panel{ext}"'))
        return ["fit", tmp / "model.toml"]
    return Case(f"repeated column name in {ext[1:]} header", setup,
                (f"panel{ext}", "column 'x' appears 2 times in the header", "columns 4 and 7"))


# Issue 12: degenerate data (each was a number and a verdict with exit 0 before),
# repeated header names, biennial periods.
DEGENERATE_CASES = [
    data_case("regressor constant everywhere", lambda d: d.assign(x=5.0),
              "regressor 'x' has the same value (5) in every row", "cannot be told apart"),
    data_case("regressor identical to the outcome", lambda d: d.assign(x=d["y"]),
              "regressor 'x' equals the outcome 'y' in every row"),
    data_case("regressor an affine copy of the outcome", lambda d: d.assign(x=3.0 - 2e6 * d["y"]),
              "regressor 'x' is an exact linear function of the outcome 'y'"),
    data_case("outcome constant everywhere", lambda d: d.assign(y=1.0),
              "outcome 'y' has the same value (1) in every row"),
    data_case("regressor constant in the sample", lambda d: d.assign(x=np.where(d["year"] >= 2003, 2.5, d["x"])),
              "regressor 'x' has the same value (2.5) in every row in sample 'late'",
              model_edit=add('[sample]\nname = "late"\nperiod_from = 2003')),
    data_case("regressor an affine function of another (system GMM)",
              lambda d: d.assign(z=2.0 * d["x"] + 1.0),
              "x[t] and z[t] are exact linear functions of each other and of the constant",
              model_edit=add('[[model.regressors]]\nname = "z"\nlags = [0]\nrole = "exogenous"')),
    data_case("regressor that varies only over time",
              lambda d: d.assign(z=0.1 * (d["year"] - 2000) ** 2),
              "z[t] is an exact linear function of the constant and period effects",
              model_edit=add('[[model.regressors]]\nname = "z"\nlags = [0]\nrole = "exogenous"')),
    data_case("unit ids of numbers and text side by side",
              lambda d: at(d, "firm", 12, "F3"), "panel.xlsx",
              "unit column 'firm' holds both numbers (1 at row 2) and text ('F3' at row 14)",
              ext=".xlsx"),
    data_case("biennial periods", lambda d: d.assign(year=1990 + 2 * (d["year"] - 2001)),
              "period column 'year' holds periods spaced 2 apart (1990, 1992, 1994, ...)",
              "running period number"),
    _dup_header(".csv"), _dup_header(".xlsx"), _dup_header(".parquet"),
]

CLI_CASES = [
    cli_case("model file missing", lambda t: ["fit", t / "nope.toml"], "nope.toml: model file not found"),
    cli_case("model path is a folder", lambda t: ["fit", t], "is a folder"),
    cli_case("data file given as model", lambda t: ["fit", t / "panel.csv"], "panel.csv: this is a data file"),
    cli_case("unknown command", lambda t: ["estimate", t / "model.toml"], "invalid choice: 'estimate'"),
    cli_case("unknown option", lambda t: ["fit", t / "model.toml", "--jason", "a.json"], "--jason"),
    cli_case("jobs zero", lambda t: ["audit", t / "model.toml", "--out", t / "o", "--jobs", "0"], "argument --jobs", "(got '0')"),
    cli_case("jobs not a number", lambda t: ["audit", t / "model.toml", "--out", t / "o", "--jobs", "many"],
             "argument --jobs", "(got 'many')"),
    cli_case("output folder is a file", lambda t: ["audit", t / "model.toml", "--out", t / "panel.csv"],
             "panel.csv: --out must be a folder"),
    cli_case("output folder cannot be created", lambda t: ["audit", t / "model.toml", "--out",
                                                           t / "panel.csv" / "sub"],
             "panel.csv/sub: cannot create the --out folder"),
    cli_case("foreign non-empty output folder", lambda t: ["audit", t / "model.toml", "--out", t],
             "is not empty", "--force"),
    cli_case("json path is a folder", lambda t: ["fit", t / "model.toml", "--json", t], "--json must name a file"),
    cli_case("report on a non-audit folder", lambda t: ["report", t], "manifest.json missing"),
    cli_case("report on a missing folder", lambda t: ["report", t / "gone"], "gone: no such folder"),
]

ALL_CASES = MODEL_CASES + DATA_CASES + DEGENERATE_CASES + CLI_CASES


def test_catalogue_covers_every_section_of_the_model_file():
    # the catalogue follows the schema: a section added to the model file without a
    # bad-input case here fails this test (and the case ids must be distinct)
    from robustgmm.modelfile import SECTIONS
    names = [c.name for c in ALL_CASES]
    assert len(set(names)) == len(names)
    culprits = [" ".join(c.culprit) for c in ALL_CASES]
    missing = [s for s in SECTIONS if not any(f"[{s}] " in c for c in culprits)]
    assert missing == []


@pytest.mark.parametrize("case", ALL_CASES, ids=[c.name for c in ALL_CASES])
def test_bad_input_exits_2_and_names_the_culprit(case, tmp_path, capsys):
    argv = [str(a) for a in case.setup(tmp_path)]
    code = main(argv)
    out, err = capsys.readouterr()
    assert code == 2, (code, err)
    assert "Traceback" not in err and "Traceback" not in out
    lines = err.strip().splitlines()
    assert lines and all(line.startswith("robustgmm: error: ") for line in lines), err
    assert any(all(f in line for f in case.culprit) for line in lines), err
    assert not (tmp_path / "out" / "manifest.json").exists()


def test_more_instruments_than_observations(tmp_path, capsys):
    frame = good_frame(n=3, periods=10)
    frame.to_csv(tmp_path / "panel.csv", index=False)
    model = GOOD_MODEL.replace('form = "collapsed"', 'form = "per-period"').replace(
        "last_lag = 3", 'last_lag = "all"')
    (tmp_path / "model.toml").write_text(model)
    code = main(["fit", str(tmp_path / "model.toml")])
    _, err = capsys.readouterr()
    assert code == 2 and "instruments" in err and "observations" in err
