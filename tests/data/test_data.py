"""Data layer: calendar layout, row-order independence, readers, validation messages.

Expectations follow the data layer's promise (DEVELOPERS.md, Panel: lags on the
calendar, a gap makes the lag missing and never borrows the previous row); the panels are
small invented ones whose right answer is known by construction.
"""
from __future__ import annotations

import numpy as np
import pandas as pd
import pytest

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
    path = tmp_path / f"panel{ext}"
    if ext == ".csv":
        df.to_csv(path, index=False)
    elif ext == ".parquet":
        df.to_parquet(path, index=False)
    elif ext == ".dta":
        df.to_stata(path, write_index=False)
    else:
        df.to_excel(path, index=False)
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
