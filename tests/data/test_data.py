"""Data layer: calendar layout, row-order independence, readers, validation messages.

Expectations follow the data layer's promise (DEVELOPERS.md, Panel: lags on the
calendar, a gap makes the lag missing and never borrows the previous row); the panels are
small invented ones whose right answer is known by construction.
"""
from __future__ import annotations

import numpy as np
import pandas as pd
import pytest

from helpers_audit import write_frame
from robustgmm.data import build_panel, load_panel, read_frame
from robustgmm.errors import InputError
from robustgmm.modelfile import spec_from_dict
from robustgmm.spec import SampleFilter


def make_spec(tmp_path=None, file="panel.csv", **model):
    d = {"data": {"unit": "id", "period": "year"},
         "model": {"outcome": "y", "regressors": [{"name": "x", "lags": [0, 1]}]}}
    if file is not None:
        d["data"]["file"] = file
    d["model"].update(model)
    return spec_from_dict(d, base_dir=tmp_path, source="m.toml")


def frame(n_units=3, years=range(2000, 2006), seed=0):
    rng = np.random.default_rng(seed)
    rows = [(u, t) for u in range(1, n_units + 1) for t in years]
    df = pd.DataFrame(rows, columns=["id", "year"])
    df["y"] = rng.normal(size=len(df))
    df["x"] = rng.normal(size=len(df))
    df["sector"] = df["id"] % 2
    return df


def problems(df, spec=None, sample=None):
    spec = spec or make_spec()
    with pytest.raises(InputError) as info:
        build_panel(df, spec, sample=sample)
    return info.value.problems


# -- calendar layout -------------------------------------------------------------
def test_gap_loses_exactly_the_affected_lags():
    df = frame()
    gap = (df["id"] == 2) & (df["year"] == 2002)
    panel = build_panel(df[~gap], make_spec())
    assert list(panel.periods) == list(range(2000, 2006))
    y = panel.values["y"]
    lag1, lag2 = panel.lagged("y", 1), panel.lagged("y", 2)
    row = list(panel.units).index(2)
    assert np.isnan(y[row, 2])                      # the missing year itself
    assert np.isnan(lag1[row, 3]) and np.isnan(lag2[row, 4])   # lags that point at it
    # every other lag of unit 2 is the value of the calendar year it points at
    for t in range(6):
        if t - 1 >= 0 and t != 3:
            assert lag1[row, t] == y[row, t - 1]
        if t - 2 >= 0 and t != 4:
            assert lag2[row, t] == y[row, t - 2]
    assert np.isnan(lag1[row, 0]) and np.all(np.isnan(lag2[row, :2]))
    # the gap never borrows the previous row: lag 1 at 2003 is not the 2001 value
    df_y = df.set_index(["id", "year"])["y"]
    assert lag1[row, 3] != df_y[(2, 2001)]
    # other units are untouched
    for u in (1, 3):
        r = list(panel.units).index(u)
        assert np.all(np.isfinite(lag1[r, 1:]))


def test_unbalanced_start_and_end():
    df = frame()
    df = df[~((df["id"] == 1) & (df["year"] < 2002))]
    panel = build_panel(df, make_spec())
    assert np.all(np.isnan(panel.values["y"][0, :2]))
    assert np.isnan(panel.lagged("y", 1)[0, 2]) and np.isfinite(panel.lagged("y", 1)[0, 3])


def test_row_order_does_not_matter():
    df = frame(n_units=6)
    df["id"] = df["id"].map(lambda u: f"firm{u:02d}")
    spec = make_spec()
    a = build_panel(df, spec)
    b = build_panel(df.sample(frac=1.0, random_state=3).reset_index(drop=True), spec)
    assert list(a.units) == list(b.units) == sorted(df["id"].unique())
    assert a.data_hash == b.data_hash and len(a.data_hash) == 64
    for k in a.values:
        np.testing.assert_array_equal(a.values[k], b.values[k])
    # the hash does change with the data
    c = df.copy()
    c.loc[0, "y"] += 1e-9
    assert build_panel(c, spec).data_hash != a.data_hash


def test_missing_values_drop_only_their_rows():
    df = frame()
    df.loc[[1, 7], "x"] = np.nan
    df.loc[7, "y"] = np.nan
    panel = build_panel(df, make_spec())
    assert panel.dropped_missing == 2
    assert np.isnan(panel.values["x"]).sum() == 2


# -- readers ----------------------------------------------------------------------
@pytest.mark.parametrize("ext", [".csv", ".parquet", ".dta", ".xlsx"])
def test_reader_round_trip(tmp_path, ext):
    df = frame(n_units=4)
    df["x"] = df["x"].round(6)
    path = write_frame(df, tmp_path / f"panel{ext}")
    spec = make_spec(tmp_path, file=path.name)
    panel = load_panel(spec)
    expected = build_panel(df, spec)
    np.testing.assert_allclose(panel.values["y"], expected.values["y"], rtol=1e-12)
    np.testing.assert_allclose(panel.values["x"], expected.values["x"], rtol=1e-12)
    assert list(panel.periods) == list(expected.periods)
    assert [int(u) for u in panel.units] == [int(u) for u in expected.units]


def test_read_frame_reads_only_needed_columns(tmp_path):
    df = frame()
    df["unused"] = "text that would fail a numeric check"
    df.to_csv(tmp_path / "panel.csv", index=False)
    spec = make_spec(tmp_path)
    got = read_frame(spec)
    assert set(got.columns) == {"id", "year", "y", "x"}
    spec_s = spec_from_dict({**spec.to_dict(), "sample": {"exclude": {"column": "sector", "values": [1]}}})
    assert "sector" in read_frame(spec_s).columns


def test_semicolon_csv_is_read(tmp_path):
    frame().to_csv(tmp_path / "panel.csv", index=False, sep=";")
    assert load_panel(make_spec(tmp_path)).n_units == 3


# -- sample filters ---------------------------------------------------------------
def test_sample_period_window_and_exclusion():
    df = frame(n_units=4)
    spec = make_spec()
    p = build_panel(df, spec, sample=SampleFilter("late", period_from=2002))
    assert list(p.periods) == [2002, 2003, 2004, 2005]
    p = build_panel(df, spec, sample=SampleFilter("odd", exclude_column="sector", exclude_values=(0,)))
    assert list(p.units) == [1, 3]
    # a unit with any excluded row is dropped whole
    df.loc[(df["id"] == 1) & (df["year"] == 2003), "sector"] = 0
    p = build_panel(df, spec, sample=SampleFilter("odd", exclude_column="sector", exclude_values=(0,)))
    assert list(p.units) == [3]
    # the base sample of the spec applies by default
    spec_b = spec_from_dict({**spec.to_dict(), "sample": {"period_to": 2003}})
    assert list(build_panel(df, spec_b).periods) == [2000, 2001, 2002, 2003]


def test_sample_that_leaves_nothing():
    lines = problems(frame(), sample=SampleFilter("future", period_from=2050))
    assert lines == ["m.toml: sample 'future' leaves no rows (the data runs from 2000 to 2005)"]
    lines = problems(frame(), sample=SampleFilter("none", exclude_column="sector", exclude_values=(9,)))
    assert "none of the excluded values 9 occurs in column 'sector'" in lines[0]


# -- validation -------------------------------------------------------------------
def test_file_errors(tmp_path):
    with pytest.raises(InputError, match=r"panel.csv: data file not found \(\[data\] file in m.toml\)"):
        load_panel(make_spec(tmp_path))
    with pytest.raises(InputError, match=r"\[data\] file is not set"):
        load_panel(make_spec(file=None))
    (tmp_path / "panel.parquet").write_text("not parquet")
    with pytest.raises(InputError, match="panel.parquet: cannot read as parquet"):
        load_panel(make_spec(tmp_path, file="panel.parquet"))


def test_missing_column_suggests_close_name(tmp_path):
    df = frame().rename(columns={"x": "X1"})
    df.to_csv(tmp_path / "panel.csv", index=False)
    spec = make_spec(tmp_path, regressors=[{"name": "x1"}])
    with pytest.raises(InputError) as info:
        load_panel(spec)
    assert info.value.problems == [f"{tmp_path / 'panel.csv'}: column 'x1' not found "
                                   "(did you mean 'X1'?); it is named in m.toml"]


def test_text_in_numeric_column_names_value_and_line(tmp_path):
    df = frame()
    df["x"] = df["x"].astype(object)
    df.loc[4, "x"] = "n.a."
    df.to_csv(tmp_path / "panel.csv", index=False)
    with pytest.raises(InputError) as info:
        load_panel(make_spec(tmp_path))
    (line,) = info.value.problems
    assert "column 'x' must be numeric: text 'n.a.' at line 6" in line   # header is line 1


def test_blank_and_na_cells_are_missing_not_text(tmp_path):
    (tmp_path / "panel.csv").write_text(
        "id,year,y,x\n" + "\n".join(f"{u},{t},{u + t / 10},{'NA' if t == 2001 else t}"
                                    for u in (1, 2) for t in range(2000, 2005)) + "\n")
    panel = load_panel(make_spec(tmp_path))
    assert panel.dropped_missing == 2


@pytest.mark.parametrize("mutate,fragment", [
    (lambda d: d.assign(year=d["year"] + 0.5), "period column 'year' must hold whole numbers: 2000.5 at row 0"),
    (lambda d: d.assign(year=d["year"].astype(object).where(d.index != 3, "2003a")),
     "period column 'year' must be numeric: text '2003a' at row 3"),
    (lambda d: d.assign(year=d["year"].where(d.index != 2)), "period column 'year' is empty at row 2"),
    (lambda d: d.assign(year=d["year"] * 100 + 1), "looks like year-month codes"),
    (lambda d: d.assign(year=d["year"] * 10000), "periods on the calendar"),
    (lambda d: d.assign(id=d["id"].where(d.index != 5)), "unit column 'id' is empty at row 5"),
    (lambda d: pd.concat([d, d.iloc[[2, 8]]]), "duplicate id-year rows: (id=1, year=2002) at row 2 and row 2"),
    (lambda d: d.assign(x=d["x"].where(d.index != 4, np.inf)), "column 'x' holds an infinite value (inf) at row 4"),
    (lambda d: d.assign(x=np.nan), "column 'x' is missing in every row"),
    (lambda d: d[d["year"] == 2003], "only one period (2003)"),
    (lambda d: d[d["year"] < 2002], "2 periods (2000-2001) are too few for the requested lags"),
    (lambda d: d.iloc[0:0], "the data has no rows"),
    (lambda d: d.drop(columns="x").rename(columns={"y": "Y"}), "column 'x' not found"),
])
def test_data_problems(mutate, fragment):
    lines = problems(mutate(frame()))
    assert any(fragment in line for line in lines), lines
    assert all(line.startswith("m.toml: ") for line in lines)


def test_too_few_periods_counts_the_lags():
    # outcome lags up to 3 need 5 periods (lags back to t-4 in differences)
    spec = make_spec(outcome_lags=[1, 2, 3])
    df = frame(years=range(2000, 2004))
    lines = problems(df, spec)
    assert "4 periods (2000-2003) are too few" in lines[0] and "at least 5" in lines[0]
    build_panel(frame(years=range(2000, 2005)), spec)   # five periods are enough


def test_several_problems_reported_together():
    df = frame()
    df["x"] = df["x"].astype(object)
    df.loc[1, "x"] = "abc"
    df.loc[2, "y"] = -np.inf
    lines = problems(df)
    assert len(lines) == 2


# ---------------------------------------------------------------------------
# issue 12 (items 2-4): degenerate columns, repeated headers, white space in ids
# ---------------------------------------------------------------------------
def test_panel_arrays_are_read_only():
    """Issue 9: a panel names its content by data_hash; mutating an array in place
    must fail rather than change an estimate under an unchanged hash."""
    panel = build_panel(frame(), make_spec())
    for arr in (panel.values["y"], panel.units, panel.periods, panel.lagged("x", 0)):
        with pytest.raises(ValueError, match="read-only"):
            arr[0] = 99
    with pytest.raises(TypeError):
        panel.values["y"] = np.zeros_like(panel.values["y"])


def test_read_only_panel_leaves_the_callers_arrays_writable():
    from robustgmm.data import Panel
    y = np.zeros((2, 3))
    panel = Panel(units=np.array([1, 2]), periods=np.arange(3), values={"y": y})
    y[0, 0] = 1.0  # the caller's own array
    assert panel.values["y"][0, 0] == 1.0 and not panel.values["y"].flags.writeable


def _ids_with_spaces():
    df = frame(n_units=4)
    df["id"] = df["id"].map(lambda u: f"F{u}")
    return df


def test_unit_ids_differing_only_by_white_space_are_one_unit(tmp_path):
    """Decision (issue 12, item 4): white space around text ids is removed, so "F2"
    and "F2 " are one unit (not split silently), with one warning naming an example;
    the panel equals the one from clean ids."""
    from robustgmm.errors import DataWarning
    clean = _ids_with_spaces()
    spaced = clean.copy()
    spaced.loc[spaced.index[spaced["id"] == "F2"][:3], "id"] = "F2 "
    spaced.loc[spaced.index[spaced["id"] == "F3"][:1], "id"] = "  F3"
    spec = make_spec(tmp_path)
    clean.to_csv(tmp_path / "panel.csv", index=False)
    want = load_panel(spec)
    spaced.to_csv(tmp_path / "panel.csv", index=False)
    with pytest.warns(DataWarning) as record:
        got = load_panel(spec)
    assert len(record) == 1
    text = str(record[0].message)
    assert "unit column 'id': 2 id(s)" in text and "'F2' and 'F2 '" in text
    assert list(got.units) == list(want.units) == ["F1", "F2", "F3", "F4"]
    assert got.data_hash == want.data_hash
    for name in want.values:
        np.testing.assert_array_equal(got.values[name], want.values[name])


def test_white_space_warning_is_one_line_on_the_command_line(tmp_path, capsys):
    from robustgmm.cli import main
    df = _ids_with_spaces()
    df.loc[0, "id"] = " F1"
    df.to_csv(tmp_path / "panel.csv", index=False)
    (tmp_path / "m.toml").write_text(
        '[data]\nfile = "panel.csv"\nunit = "id"\nperiod = "year"\n'
        '[model]\noutcome = "y"\n[[model.regressors]]\nname = "x"\nlags = [0]\n'
        '[method]\nequations = "difference"\n[instruments]\nform = "collapsed"\n')
    main(["fit", str(tmp_path / "m.toml")])
    err = capsys.readouterr().err
    warning = [line for line in err.splitlines() if "white space" in line]
    assert len(warning) == 1 and warning[0].startswith("robustgmm: warning: "), err
    assert "' F1'" in warning[0]


def test_ids_merged_by_white_space_in_one_period_are_duplicates():
    df = _ids_with_spaces()
    extra = df[(df["id"] == "F1") & (df["year"] == 2001)].assign(id="F1 ")
    with pytest.warns(Warning):
        lines = problems(pd.concat([df, extra], ignore_index=True))
    assert any("duplicate id-year rows" in line and "id=F1, year=2001" in line for line in lines)


def test_repeated_unused_column_name_is_harmless(tmp_path):
    """Only repeated names the model uses are errors (which column would it be?)."""
    df = frame()
    text = "id,year,y,x,sector,sector\n" + df.assign(s2=1).to_csv(index=False, header=False)
    (tmp_path / "panel.csv").write_text(text)
    panel = load_panel(make_spec(tmp_path))
    assert panel.n_units == 3


def test_mangled_name_of_a_repeat_is_not_a_column(tmp_path):
    """pandas would call the second 'x' 'x.1'; that name is not in the file."""
    df = frame()
    (tmp_path / "panel.csv").write_text("id,year,y,x,x\n" + df.drop(columns="sector").assign(
        x2=1.0).to_csv(index=False, header=False))
    spec = spec_from_dict({"data": {"unit": "id", "period": "year", "file": "panel.csv"},
                           "model": {"outcome": "y", "regressors": [{"name": "x.1"}]}},
                          base_dir=tmp_path, source="m.toml")
    with pytest.raises(InputError, match=r"column 'x.1' not found"):
        load_panel(spec)


@pytest.mark.parametrize("value", [5.0, -0.25, 1e9])
def test_constant_regressor_is_found_at_any_value(value):
    lines = problems(frame().assign(x=value))
    assert any("regressor 'x' has the same value" in line for line in lines), lines


@pytest.mark.parametrize("scale", [1e-6, 1.0, 1e8])
def test_affine_copy_of_the_outcome_is_found_in_any_units(scale):
    df = frame()
    lines = problems(df.assign(x=scale * (df["y"] + 7.0)))
    assert any("exact linear function of the outcome 'y'" in line for line in lines), lines


def test_a_regressor_correlated_but_not_a_copy_is_accepted():
    df = frame()
    df["x"] = df["y"] + 1e-6 * np.random.default_rng(1).normal(size=len(df))
    assert build_panel(df, make_spec()).n_units == 3


def test_a_varied_sample_where_a_regressor_is_constant_fails_only_its_variants(tmp_path):
    """Degenerate only in one sample: that sample's variants fail with the reason
    naming the column; the base sample's variants are estimated."""
    from robustgmm.audit import grid, runner
    df = frame(n_units=30, years=range(2000, 2008))
    df.loc[df["year"] >= 2003, "x"] = 2.5
    df.to_csv(tmp_path / "panel.csv", index=False)
    spec = spec_from_dict({"data": {"unit": "id", "period": "year", "file": "panel.csv"},
                           "model": {"outcome": "y", "regressors": [{"name": "x", "lags": [0]}]},
                           "instruments": {"form": "collapsed"},
                           "audit": {"vary": {"sample": [{"name": "late", "period_from": 2003}]}}},
                          base_dir=tmp_path, source="m.toml")
    panels = grid.load_panels(spec)
    variants = grid.plan(spec, panels, counts=False)
    out, _ = runner.run_variants(variants, panels, jobs=1)
    late = [v for v in variants if v.spec.sample.name == "late"]
    assert late and all(out[v.id].status == runner.FAILED for v in late)
    assert all("regressor 'x' has the same value (2.5) in every row in sample 'late'"
               in out[v.id].reason for v in late)
    assert all(out[v.id].status == runner.OK for v in variants if v.spec.sample.name != "late")


# -- column types: inferred from the whole column (issue 12 item 12) ---------------
#: pandas parses a csv in chunks of 2**18 rows by default; a column whose kind
#: changes after the first chunk is the case that used to leak a DtypeWarning.
CHUNK_ROWS = 2 ** 18


def _long_csv(path, tail: str):
    """A csv longer than one parser chunk: numeric ids 1..N (5 periods each), then
    the rows of ``tail`` (written raw)."""
    n_units = CHUNK_ROWS // 5 + 10
    ids = np.repeat(np.arange(1, n_units + 1), 5)
    years = np.tile(np.arange(2000, 2005), n_units)
    body = pd.DataFrame({"id": ids, "year": years, "y": 0.5 * (ids % 7) + years % 3,
                         "x": (ids % 5) * 1.0 + (years % 2)})
    path.write_text(body.to_csv(index=False) + tail)


def test_a_long_csv_is_typed_by_whole_columns(tmp_path, recwarn):
    # text ids only after the first chunk: the column is one kind (text), no warning
    # reaches stderr, and id 7 written in the first chunk stays the unit "7"
    _long_csv(tmp_path / "panel.csv", "".join(f"Z9,{2000 + t},1.0,{t % 2}.5\n" for t in range(5)))
    got = read_frame(make_spec(tmp_path))
    assert not [w for w in recwarn if issubclass(w.category, pd.errors.DtypeWarning)]
    assert {type(v) for v in got["id"]} == {str}
    assert (got["id"] == "7").sum() == 5 and (got["id"] == "Z9").sum() == 5


def test_text_late_in_a_long_numeric_column_is_one_line(tmp_path, recwarn):
    _long_csv(tmp_path / "panel.csv", "99999999,2000,1.0,abc\n")
    with pytest.raises(InputError) as info:
        read_frame(make_spec(tmp_path))
    assert not [w for w in recwarn if issubclass(w.category, pd.errors.DtypeWarning)]
    (line,) = info.value.problems
    assert "panel.csv" in line and "column 'x' must be numeric: text 'abc'" in line
    assert f"line {CHUNK_ROWS // 5 * 5 + 50 + 2}" in line


def test_unit_ids_of_numbers_and_text_side_by_side_are_an_error(tmp_path):
    # a spreadsheet column whose cells are typed differently (numbers, and text ids
    # such as "C3"): whether 7 and "7" are one unit would depend on how they are
    # compared, so robustgmm asks for one way of writing the ids
    df = frame(n_units=3).astype({"id": object})
    df.loc[df["id"] == 3, "id"] = "C3"
    df.to_excel(tmp_path / "panel.xlsx", index=False)
    with pytest.raises(InputError) as info:
        read_frame(make_spec(tmp_path, file="panel.xlsx"))
    (line,) = info.value.problems
    assert "panel.xlsx" in line and "unit column 'id' holds both numbers (1 at row 2)" in line
    assert "and text ('C3' at row 14)" in line and "the same way" in line
