"""The fast paths of the data layer (issue 17) give what the plain pandas calls they
replace give: the pyarrow CSV engine's frame equals the C engine's (or the C engine
reads the file), the duplicate check equals ``DataFrame.duplicated(keep=False)``,
the unit codes equal ``pd.factorize(sort=True)``, and the panel hash names the rows
that exist. The references are the pandas functions themselves."""
from __future__ import annotations

from pathlib import Path

import numpy as np
import pandas as pd
import pytest

from robustgmm.data import build_panel
from robustgmm.data import readers
from robustgmm.data.validate import _affine_copy, _duplicate_cells, _one_value, unit_codes
from robustgmm.modelfile import spec_from_dict


def _c_engine(path: Path, columns) -> pd.DataFrame:
    return readers._read_csv(path, usecols=lambda c: c in set(columns), low_memory=False)


CSV_CASES = {
    "numbers": "id,year,y,x\n1,2000,1.5,2\n1,2001,0.1,3\n2,2000,,4\n2,2001,1e-3,-5\n",
    "text ids": "id,year,y,x\nA1,2000,1.5,2\nB 2,2001,NA,3\n007x,2000,0.25,\n",
    "leading zeros": "id,year,y,x\n007,2000,1.5,2\n008,2001,0.1,3\n",
    "many decimals": "id,year,y,x\n1,2000,0.1000000000000000055511151231257827,2\n"
                     "1,2001,2.2250738585072014e-308,3\n",
    "semicolons": "id;year;y;x\n1;2000;1.5;2\n2;2001;0.5;3\n",
}


@pytest.mark.parametrize("case", sorted(CSV_CASES))
def test_fast_csv_frame_equals_the_c_engine(tmp_path, case):
    path = tmp_path / "panel.csv"
    path.write_text(CSV_CASES[case], encoding="utf-8")
    cols = ["id", "year", "y", "x"]
    fast = readers._read_csv_fast(path, cols)
    assert fast is not None
    pd.testing.assert_frame_equal(fast[cols], _c_engine(path, cols)[cols], check_exact=True)


@pytest.mark.parametrize("text", [
    "id,year,y\n 7,2000,1.5\n 8,2001,0.1\n",          # numbers written with a space
    "id,year,y\n1,2000-01-01,1.5\n2,2001-01-01,2\n",   # dates: pyarrow would type them
    "id,year,y\n1,2000,1.5\nx,2001,2\n",               # a number, then text
    "id,year,y\n1,2000,true\n2,2001,false\n",          # booleans
    "id,year,y\n1,2000,\n2,2001,\n",                   # an empty column
])
def test_fast_csv_equals_the_c_engine_or_gives_way(tmp_path, text):
    path = tmp_path / "panel.csv"
    path.write_text(text, encoding="utf-8")
    cols = ["id", "year", "y"]
    want = _c_engine(path, cols)[cols]
    fast = readers._read_csv_fast(path, cols)
    if fast is not None:
        pd.testing.assert_frame_equal(fast[cols], want, check_exact=True)
    pd.testing.assert_frame_equal(readers._read(path, ".csv", cols)[cols], want,
                                  check_exact=True)


def test_latin1_csv_is_read_by_the_c_engine(tmp_path):
    path = tmp_path / "panel.csv"
    path.write_bytes("id,year,y\nK\xf6ln,2000,1.5\nK\xf6ln,2001,2\n".encode("latin-1"))
    frame = readers._read(path, ".csv", ["id", "year", "y"])
    assert list(frame["id"]) == ["K\xf6ln", "K\xf6ln"]


def _duplicates_against_pandas(units, periods, ids):
    """The frame of ``units`` and ``periods`` with the ids of kind ``ids`` (dense
    whole numbers, sparse whole numbers or text) and its duplicate cells, checked
    against ``DataFrame.duplicated(keep=False)``."""
    if ids == "sparse":
        units = units * 10**9
    frame = pd.DataFrame({"u": units, "t": periods})
    if ids == "text":
        frame["u"] = "firm" + frame["u"].astype(str)
    want = frame.duplicated(["u", "t"], keep=False).to_numpy()
    got = _duplicate_cells(frame["u"], frame["t"].to_numpy()).to_numpy()
    np.testing.assert_array_equal(got, want)
    return frame, got


@pytest.mark.parametrize("repeats", [True, False])
@pytest.mark.parametrize("ids", ["dense", "sparse", "text"])
def test_duplicates_and_unit_codes_equal_pandas(ids, repeats):
    rng = np.random.default_rng(4)
    n = 3000
    if repeats:
        units, periods = rng.integers(1, 400, size=n), rng.integers(1990, 2010, size=n)
    else:  # every cell once, in shuffled order (the path without counts)
        cells = rng.permutation(400 * 20)[:n]
        units, periods = 1 + cells // 20, 1990 + cells % 20
    frame, got = _duplicates_against_pandas(units, periods, ids)
    codes, uniques = unit_codes(frame["u"])
    ref_codes, ref_uniques = pd.factorize(frame["u"], sort=True)
    np.testing.assert_array_equal(codes, ref_codes)
    np.testing.assert_array_equal(np.asarray(uniques), np.asarray(ref_uniques))


def test_hash_counts_a_row_whose_used_values_are_all_missing():
    spec = spec_from_dict({"data": {"unit": "id", "period": "year"},
                           "model": {"outcome": "y", "regressors": [{"name": "x"}]}},
                          source="m.toml")
    rng = np.random.default_rng(0)
    rows = [(u, t) for u in range(1, 5) for t in range(2000, 2008)]
    df = pd.DataFrame(rows, columns=["id", "year"])
    df["y"], df["x"] = rng.normal(size=len(df)), rng.normal(size=len(df))
    empty_row = df.copy()
    empty_row.loc[3, ["y", "x"]] = np.nan
    without = empty_row.drop(index=3)
    a, b = build_panel(empty_row, spec), build_panel(without, spec)
    for name in a.values:  # the same arrays ...
        np.testing.assert_array_equal(a.values[name], b.values[name])
    assert a.data_hash != b.data_hash  # ... but not the same rows
    assert a.dropped_missing == b.dropped_missing + 1


@pytest.mark.parametrize("case", ["varies early", "varies late", "constant", "constant with gaps",
                                  "all missing"])
def test_one_value_equals_the_check_over_present_values(case):
    """_one_value (the degenerate-column check) against its definition: the present
    values all equal, checked on the whole column."""
    rng = np.random.default_rng(2)
    v = np.full(5000, 2.5)
    if case == "varies early":
        v = rng.normal(size=5000)
    elif case == "varies late":  # the first rows alone would say constant
        v[4000] = 3.0
    elif case == "constant with gaps":
        v[rng.random(5000) < 0.3] = np.nan
        v[:300] = np.nan
    elif case == "all missing":
        v[:] = np.nan
    present = v[~np.isnan(v)]
    want = float(present[0]) if present.size and np.all(present == present[0]) else None
    assert _one_value(v, np.isnan(v)) == want


def test_affine_copy_check_matches_its_definition():
    rng = np.random.default_rng(1)
    y = rng.normal(size=5000) + 1e6          # a large level: no spread lost
    assert _affine_copy(3.0 - 2.0 * y, y)
    near = 3.0 - 2.0 * y
    near[17] += 1e-3                          # one row off: not a copy
    assert not _affine_copy(near, y)
    assert not _affine_copy(rng.normal(size=5000), y)


@pytest.mark.parametrize("ids", ["dense", "sparse", "text"])
@pytest.mark.parametrize("repeats", [True, False])
def test_duplicates_of_sorted_rows_equal_pandas(ids, repeats):
    """Rows in (unit, period) order (the shortcut that skips the unit codes), with and
    without a repeated cell, against ``DataFrame.duplicated(keep=False)``."""
    units = np.repeat(np.arange(1, 301), 6)
    periods = np.tile(np.arange(2000, 2006), 300)
    if repeats:  # the same unit-period twice, next to each other: still sorted
        units, periods = np.insert(units, 50, units[50]), np.insert(periods, 50, periods[50])
    frame, got = _duplicates_against_pandas(units, periods, ids)
    assert got.any() == repeats


@pytest.mark.parametrize("ids", ["dense", "sparse", "text"])
@pytest.mark.parametrize("balanced", [True, False])
def test_layout_of_sorted_rows_equals_the_layout_of_shuffled_rows(balanced, ids):
    """A balanced frame in (unit, period) order is laid out by copying its columns
    (whole-number ids: told without the unit codes); the same rows shuffled go
    through the scatter: the ids, the arrays (bit for bit, one NaN pattern), the rows
    with all values missing and the hash are the same."""
    from robustgmm.data import panel_from_frame
    rng = np.random.default_rng(5)
    units = np.repeat(np.arange(1, 701), 7)  # 4,900 rows: past the first-rows look
    if ids == "sparse":
        units = units * 10**9
    df = pd.DataFrame({"unit": units if ids != "text" else [f"u{u:04d}" for u in units],
                       "period": np.tile(np.arange(1990, 1997), 700)})
    df["y"], df["x"] = rng.normal(size=len(df)), rng.normal(size=len(df))
    y = df["y"].to_numpy().copy()
    y[[3, 100]] = np.nan
    y[[5]] = -np.nan  # another NaN bit pattern: laid out as the one pattern
    df["y"] = y
    if not balanced:
        df = df.drop(index=[10, 11, 200]).reset_index(drop=True)
    shuffled = df.sample(frac=1.0, random_state=3)
    a = panel_from_frame(df, "unit", "period", ["y", "x"])
    b = panel_from_frame(shuffled, "unit", "period", ["y", "x"])
    assert a.units.dtype == b.units.dtype
    np.testing.assert_array_equal(a.units, b.units)
    for name in ("y", "x"):
        assert a.values[name].tobytes() == b.values[name].tobytes()
    assert np.isnan(a.values["y"]).sum() == 3 + (0 if balanced else 3)
    assert a.data_hash == b.data_hash and a.dropped_missing == b.dropped_missing == 3


def test_affine_copy_with_the_outcome_sums_at_hand_is_the_same_check():
    from robustgmm.data.validate import _shifted_sums
    rng = np.random.default_rng(6)
    y = rng.normal(size=4000) * 1e-3 + 50.0
    near = 1.0 + 4.0 * y
    near[9] += 1e-6
    for x in (1.0 + 4.0 * y, near, rng.normal(size=4000)):
        assert _affine_copy(x, y, _shifted_sums(y)) == _affine_copy(x, y)


@pytest.mark.parametrize("periods", [
    [2001, 2003, 2003, 2001, 2007],        # years: counted as they are
    [0, 5, 5, 1],                          # from 0
    [-3, -1, 4, 4],                        # below 0: shifted
    [10**9, 10**9 + 2, 10**9 + 1],         # beyond the small calendar: shifted
    [131071, 131070, 131072],              # across the limit of the unshifted count
])
def test_distinct_periods_equal_numpy_unique(periods):
    from robustgmm.data.validate import _distinct, _period_step
    ints = np.asarray(periods, dtype=np.int64)
    want = np.unique(ints)
    np.testing.assert_array_equal(_distinct(ints), want)
    np.testing.assert_array_equal(_distinct(ints, int(ints.min()), int(ints.max())), want)
    gaps = np.diff(want)
    assert _period_step(ints) == (int(np.gcd.reduce(gaps)) if len(gaps) else 1)
