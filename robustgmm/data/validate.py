"""Validation of a long panel frame: one line per problem, naming file, column, row.

:func:`validate_frame` checks the unit and period columns and the model's columns;
:func:`degenerate_columns` finds columns that cannot identify anything on a sample
(no variation, a regressor that copies the outcome).
"""
from __future__ import annotations

import difflib
import math
import warnings
from functools import reduce
from typing import Any, Callable

import numpy as np
import pandas as pd

from ..errors import DataWarning, InputError

#: How many examples a message lists (duplicate rows, bad values).
MAX_EXAMPLES = 3
#: Widest calendar accepted: the panel is laid out on every integer between the
#: first and the last period, so a period column holding e.g. day numbers or
#: YYYYMMDD dates would make enormous, almost empty arrays.
MAX_CALENDAR = 2000


def _closest(name: str, options) -> str | None:
    options = [str(o) for o in options]
    for o in options:
        if o.lower() == str(name).lower():
            return o
    match = difflib.get_close_matches(str(name), options, n=1, cutoff=0.6)
    return match[0] if match else None


def _show(value: Any, limit: int = 40) -> str:
    text = repr(value) if isinstance(value, str) else str(value)
    return text if len(text) <= limit else text[: limit - 3] + "..."


def filter_columns(spec, samples=()) -> tuple[str, ...]:
    """Columns that sample filters need (base sample, then ``samples``)."""
    cols: dict[str, None] = {}
    for s in (spec.sample, *samples):
        for col in (s.columns if s is not None else ()):
            cols[col] = None
    return tuple(cols)


def _row_namer(frame: pd.DataFrame) -> Callable[[Any], str]:
    """How to name a row in messages: file line for csv, sheet row for xlsx."""
    word = frame.attrs.get("robustgmm_row_word", "row")
    offset = frame.attrs.get("robustgmm_row_offset", None)

    def name(index) -> str:
        if offset is not None and isinstance(index, (int, np.integer)):
            return f"{word} {int(index) + offset}"
        return f"{word} {index}"
    return name


def _numeric(series: pd.Series, col: str, where: str, row: Callable, problems: list,
             role: str) -> pd.Series | None:
    """float64 version of a column, or None (with problems) if it holds text."""
    s = series
    if isinstance(s.dtype, pd.CategoricalDtype):
        s = s.astype(object)
    if pd.api.types.is_bool_dtype(s.dtype):
        return s.astype(np.float64)
    if pd.api.types.is_datetime64_any_dtype(s.dtype) or pd.api.types.is_timedelta64_dtype(s.dtype):
        problems.append(f"{where}: {role} {col!r} holds dates or times, not numbers")
        return None
    if pd.api.types.is_numeric_dtype(s.dtype):
        return s.astype(np.float64)
    try:
        out = pd.to_numeric(s, errors="coerce")
    except (TypeError, ValueError):
        problems.append(f"{where}: {role} {col!r} must be numeric")
        return None
    bad = out.isna() & s.notna()
    # blank cells and common missing markers are missing values, not text
    if bad.any():
        text = s[bad].astype(str).str.strip()
        blank = text.isin(["", "NA", "N/A", "NaN", "nan", "null", "NULL", "."])
        bad_idx = text.index[~blank.to_numpy()]
        if len(bad_idx):
            first = bad_idx[0]
            more = f" and {len(bad_idx) - 1} more" if len(bad_idx) > 1 else ""
            problems.append(f"{where}: {role} {col!r} must be numeric: text {_show(s[first])} "
                            f"at {row(first)}{more}")
            return None
    try:
        return out.astype(np.float64)
    except (TypeError, ValueError):
        problems.append(f"{where}: {role} {col!r} must be numeric")
        return None


def validate_frame(frame: pd.DataFrame, spec, source: str | None = None,
                   samples=None) -> pd.DataFrame:
    """Check and normalise a long panel frame for ``spec``.

    Checks: required columns present, not empty, unit ids present, periods whole
    numbers without gaps in the column itself, no duplicate unit-period rows, model
    columns numeric and finite (NaN allowed), no model column entirely missing.
    Returns a copy with int64 periods and float64 model columns.
    """
    where = source or frame.attrs.get("robustgmm_source") or spec.source
    row = _row_namer(frame)
    attrs = dict(frame.attrs)
    samples = spec.vary.samples if samples is None else samples
    needed = list(dict.fromkeys([spec.unit, spec.period, *spec.used_columns(),
                                 *filter_columns(spec, samples)]))
    names = [str(c) for c in frame.columns]
    missing = [c for c in needed if c not in frame.columns]
    if missing:
        raise InputError([f"{where}: column {c!r} not found"
                          + (f" (did you mean {_closest(c, names)!r}?)"
                             if _closest(c, names) else "")
                          for c in missing])
    if frame.columns.duplicated().any():
        dup = [c for c in needed if list(frame.columns).count(c) > 1]
        if dup:
            raise InputError([f"{where}: column {c!r} appears more than once" for c in dup])
    if len(frame) == 0:
        raise InputError(f"{where}: the data has no rows")

    problems: list[str] = []
    # a new frame (under copy-on-write, pandas >= 3, sharing the columns until one
    # is replaced below): the caller's frame never changes and no column is copied
    # that is not converted
    out = frame[needed]

    # unit ids: present; one type so that sorting works
    units = out[spec.unit]
    # numpy integer ids hold no missing value: no pass over them
    if units.dtype.kind not in "iu" and units.isna().any():
        first = units.index[units.isna().to_numpy()][0]
        n = int(units.isna().sum())
        problems.append(f"{where}: unit column {spec.unit!r} is empty at {row(first)}"
                        + (f" and {n - 1} more rows" if n > 1 else ""))
    elif (units.dtype == object or isinstance(units.dtype, pd.CategoricalDtype)
          or pd.api.types.is_string_dtype(units.dtype)):
        is_text = _text_mask(units)
        mixed = _mixed_ids(units, is_text, spec.unit, where, row)
        if mixed:
            problems.append(mixed)
        else:
            # one kind of id (all text, or numbers of one type) sorts as is; the
            # per-value look is needed only for an object column of numbers
            several = (not is_text.all()) and len({type(v) for v in units}) > 1
            if several or isinstance(units.dtype, pd.CategoricalDtype):
                units = units.astype(str)
                is_text = np.ones(len(units), dtype=bool)
            out[spec.unit] = _strip_ids(units, is_text, spec.unit, where)

    # periods: whole numbers
    per = out[spec.period]
    # a column of signed whole numbers (the usual case) skips the float round trip
    # of the checks below: it can hold no missing or fractional value
    per_num = (per if per.dtype.kind == "i"
               else _numeric(per, spec.period, where, row, problems, "period column"))
    if per_num is not None and per_num.dtype.kind == "i":
        ints = per_num.to_numpy().astype(np.int64, copy=False)
        if per.dtype != np.int64:
            out[spec.period] = ints
        bounds = int(ints.min()), int(ints.max())  # one pass each, no |ints| copy
        if max(abs(bounds[0]), abs(bounds[1])) > 1e15:
            problems.append(f"{where}: period column {spec.period!r} holds values too "
                            f"large to be periods ({_show(per.iloc[int(np.argmax(np.abs(ints)))])})")
        else:
            _check_calendar(ints, spec.period, where, problems, bounds)
    elif per_num is not None:
        if per_num.isna().any():
            first = per_num.index[per_num.isna().to_numpy()][0]
            n = int(per_num.isna().sum())
            problems.append(f"{where}: period column {spec.period!r} is empty at {row(first)}"
                            + (f" and {n - 1} more rows" if n > 1 else ""))
        else:
            vals = per_num.to_numpy()
            frac = ~np.isfinite(vals) | (vals != np.round(vals))
            if frac.any():
                first = per_num.index[frac][0]
                problems.append(f"{where}: period column {spec.period!r} must hold whole "
                                f"numbers: {_show(per[first])} at {row(first)}")
            elif np.abs(vals).max() > 1e15:
                problems.append(f"{where}: period column {spec.period!r} holds values too "
                                f"large to be periods ({_show(per.iloc[int(np.argmax(np.abs(vals)))])})")
            else:
                ints = vals.astype(np.int64)
                out[spec.period] = ints
                _check_calendar(ints, spec.period, where, problems)

    # duplicate unit-period rows
    if not problems:
        dup = _duplicate_cells(out[spec.unit], out[spec.period].to_numpy())
        if dup.any():
            groups = out[dup].groupby([spec.unit, spec.period], sort=False).groups
            examples = []
            for key, idx in list(groups.items())[:MAX_EXAMPLES]:
                rows = " and ".join(row(i) for i in list(idx)[:2])
                examples.append(f"({spec.unit}={key[0]}, {spec.period}={key[1]}) at {rows}")
            more = len(groups) - len(examples)
            problems.append(f"{where}: duplicate {spec.unit}-{spec.period} rows: "
                            + "; ".join(examples) + (f"; and {more} more" if more > 0 else ""))

    # model columns: numeric, finite
    for col in spec.used_columns():
        if col in (spec.unit, spec.period):
            continue
        num = _numeric(out[col], col, where, row, problems, "column")
        if num is None:
            continue
        vals = num.to_numpy()
        inf = np.isinf(vals)
        if inf.any():
            first = num.index[inf][0]
            problems.append(f"{where}: column {col!r} holds an infinite value "
                            f"({num[first]}) at {row(first)}"
                            + (f" and {int(inf.sum()) - 1} more" if inf.sum() > 1 else ""))
            continue
        # a present first value settles it without a pass over the column
        if len(vals) and np.isnan(vals[0]) and np.isnan(vals).all():
            problems.append(f"{where}: column {col!r} is missing in every row")
            continue
        out[col] = num
    if problems:
        raise InputError(problems)
    out.attrs.update(attrs)
    out.attrs["robustgmm_validated"] = True
    return out




def _check_calendar(ints: np.ndarray, column: str, where: str, problems: list,
                    bounds: tuple[int, int] | None = None) -> None:
    """Whole-number periods that cannot be a calendar of consecutive numbers:
    year-month codes, a span above :data:`MAX_CALENDAR`, or a common spacing above 1.
    ``bounds``: the first and last period, when already known."""
    lo, hi = (int(ints.min()), int(ints.max())) if bounds is None else bounds
    span = hi - lo + 1
    months = ints % 100 if 100001 <= lo and hi <= 999912 else None
    if (months is not None and months.min() >= 1 and months.max() <= 12
            and hi // 100 > lo // 100):
        problems.append(
            f"{where}: period column {column!r} looks like year-month codes "
            f"({lo} to {hi}); lags are taken between consecutive "
            "whole numbers, so use a running period number instead")
    elif span > MAX_CALENDAR:
        problems.append(
            f"{where}: period column {column!r} runs from {lo} to "
            f"{hi} ({span} periods on the calendar); lags are taken "
            "between consecutive whole numbers, so use years or a running "
            "period number")
    elif (step := _period_step(ints, lo, hi)) > 1:
        shown = ", ".join(str(v) for v in _distinct(ints, lo, hi)[:3])
        problems.append(
            f"{where}: period column {column!r} holds periods spaced "
            f"{step} apart ({shown}, ...); lags are taken between consecutive "
            "whole numbers, so a lag would never find its value: use a running "
            "period number (1, 2, 3, ...) instead")


def _distinct(periods: np.ndarray, lo: int | None = None, hi: int | None = None) -> np.ndarray:
    """The distinct periods in order, from one count over the calendar (its span is
    at most :data:`MAX_CALENDAR` here): no sort of the rows. Periods from 0 to a
    small last one (years) are counted as they are, without shifting a copy."""
    lo = int(periods.min()) if lo is None else lo
    hi = int(periods.max()) if hi is None else hi
    if 0 <= lo and hi < 1 << 17:
        return lo + np.flatnonzero(np.bincount(periods, minlength=hi + 1)[lo:])
    return lo + np.flatnonzero(np.bincount(periods - lo))


def _period_step(periods: np.ndarray, lo: int | None = None, hi: int | None = None) -> int:
    """The common spacing of the distinct periods (1 for consecutive years; 2 for
    biennial waves): the greatest common divisor of their differences."""
    distinct = _distinct(periods, lo, hi)
    if len(distinct) < 2:
        return 1
    return int(reduce(math.gcd, np.diff(distinct).tolist()))


def unit_codes(units: pd.Series) -> tuple[np.ndarray, np.ndarray]:
    """``(codes, ids)``: each row's position in the sorted distinct unit ids, as
    ``pd.factorize(units, sort=True)``. Whole-number ids over a range not much wider
    than the rows (1..N, firm numbers) are counted over that range, with no hash
    table and no sort; other ids go to ``pd.factorize``, which sorts the distinct ids
    only."""
    if units.dtype.kind in "iu" and len(units):
        ids = units.to_numpy()
        lo, hi = int(ids.min()), int(ids.max())
        if hi - lo <= 4 * len(ids) + 1024:
            offset = (ids - lo).astype(np.intp, copy=False)
            present = np.bincount(offset, minlength=hi - lo + 1) > 0
            position = np.cumsum(present) - 1
            return position[offset], (lo + np.flatnonzero(present)).astype(ids.dtype)
    codes, ids = pd.factorize(units, sort=True)
    return codes, np.asarray(ids)


def _duplicate_cells(units: pd.Series, periods: np.ndarray) -> pd.Series:
    """Rows whose (unit, period) occurs more than once (all of them, as
    ``DataFrame.duplicated(keep=False)``): each row's calendar cell
    ``code(unit) × span + period − first`` counted with one ``bincount``
    (:func:`unit_codes`); when the calendar is much sparser than the rows, a
    hash-based count of the cell numbers instead."""
    if units.dtype.kind in "iu" and _sorted_cells(units.to_numpy(), periods):
        # rows in strictly increasing (unit, period) order (the usual file): no
        # cell repeats, told without the unit codes
        return pd.Series(np.zeros(len(units), dtype=bool), index=units.index)
    codes, uniques = unit_codes(units)
    lo = int(periods.min())
    span = int(periods.max()) - lo + 1
    cell = codes.astype(np.int64, copy=False) * span + (periods.astype(np.int64, copy=False) - lo)
    if len(uniques) * span <= max(8 * len(cell), 1 << 16):
        # the usual case, no repeat, told by the number of distinct cells; the
        # counts only when some cell repeats
        seen = np.zeros(len(uniques) * span, dtype=bool)
        seen[cell] = True
        if np.count_nonzero(seen) == len(cell):
            return pd.Series(np.zeros(len(cell), dtype=bool), index=units.index)
        dup = np.bincount(cell, minlength=len(uniques) * span)[cell] > 1
    else:
        dup = pd.Series(cell).duplicated(keep=False).to_numpy()
    return pd.Series(dup, index=units.index)


def _sorted_cells(units: np.ndarray, periods: np.ndarray) -> bool:
    """Whether the rows are in strictly increasing (unit, period) order: each row's
    unit above the previous row's, or the same unit and a later period. (The first
    rows are looked at first: a shuffled file is told at once.)"""
    if len(units) > 4096 and not _sorted_cells(units[:4096], periods[:4096]):
        return False
    u0, u1 = units[:-1], units[1:]
    later = u1 > u0
    later |= (u1 == u0) & (periods[1:] > periods[:-1])
    return bool(later.all())


def _text_mask(units: pd.Series) -> np.ndarray:
    """Which ids are text. A string column (pandas' ``str`` dtype, or an object column
    that pandas infers as all strings) is all text without looking at each value;
    only an object column of other or mixed kinds is looked at value by value."""
    if pd.api.types.is_string_dtype(units.dtype) and units.dtype != object:
        return np.ones(len(units), dtype=bool)
    if isinstance(units.dtype, pd.CategoricalDtype):  # one look per category
        text = np.array([isinstance(c, str) for c in units.cat.categories], dtype=bool)
        codes = units.cat.codes.to_numpy()
        return np.where(codes >= 0, text[np.maximum(codes, 0)] if len(text) else False, False)
    if units.dtype == object:
        kind = pd.api.types.infer_dtype(units, skipna=True)
        if kind == "string":
            return np.ones(len(units), dtype=bool)
        if kind in ("integer", "floating", "mixed-integer-float", "decimal", "boolean"):
            return np.zeros(len(units), dtype=bool)
    return units.map(lambda v: isinstance(v, str)).to_numpy()


def _mixed_ids(units: pd.Series, is_text: np.ndarray, column: str, where: str,
               row: Callable) -> str | None:
    """A problem line when a unit column holds numbers and text side by side (cells
    typed differently in a spreadsheet): ``7`` and ``"7"`` or ``"007"`` would be read
    as different units, or as one, depending on how they are compared, so the ids
    must be written one way. (A csv column is parsed as a whole: one kind.)"""
    if isinstance(units.dtype, pd.CategoricalDtype):
        return None
    if is_text.all() or not is_text.any():
        return None
    number, text = units.index[~is_text][0], units.index[is_text][0]
    return (f"{where}: unit column {column!r} holds both numbers ({_show(units[number])} at "
            f"{row(number)}) and text ({_show(units[text])} at {row(text)}); write every id "
            "the same way (all as text or all as numbers)")


def _strip_ids(units: pd.Series, is_text: np.ndarray, column: str, where: str) -> pd.Series:
    """Text unit ids without surrounding white space.

    ``"A1"`` and ``"A1 "`` are one unit written two ways (a common spreadsheet
    slip), not two units: robustgmm removes the white space, so they are merged, and
    warns (one line, one example) when that made two written ids one. Rows of the
    merged unit in the same period are then duplicate unit-period rows (an error).
    """
    if not is_text.any():
        return units
    stripped = (units.str.strip() if is_text.all()
                else units.where(~is_text, units[is_text].str.strip()))
    changed = is_text & (stripped != units).to_numpy()
    if changed.any():
        written = pd.DataFrame({"raw": units[is_text], "id": stripped[is_text]})
        kinds = written.drop_duplicates().groupby("id", sort=False)["raw"].agg(list)
        merged = kinds[kinds.map(len) > 1]
        if len(merged):
            example = sorted(merged.iloc[0], key=len)
            warnings.warn(DataWarning(
                f"{where}: unit column {column!r}: {len(merged)} id(s) are written with and "
                f"without surrounding white space (e.g. {' and '.join(map(repr, example[:2]))}); "
                "white space around ids is removed, so each is one unit"), stacklevel=3)
    return stripped


def degenerate_columns(frame: pd.DataFrame, spec, where: str, label: str = "") -> list[str]:
    """One line per model column that cannot identify anything on this sample.

    * the outcome with one value in every row: there is nothing to explain (an AR
      coefficient of 1 would "fit" it exactly);
    * a regressor with one value in every row: in differences it is zero and in
      levels a multiple of the constant, so its coefficient is not identified (a
      fit would return the intercept divided by the value);
    * a regressor that is an exact affine copy of the outcome (``x = a + b·y`` in every
      row where both are present): it explains the outcome exactly, and the GMM
      estimates degenerate (z in the 10^15).

    ``label`` names the sample (``" in sample 'late'"``) for messages.
    """
    problems = []
    y_all = frame[spec.outcome].to_numpy(dtype=np.float64)
    y_missing = np.isnan(y_all)
    y_one = _one_value(y_all, y_missing)
    if y_one is not None:
        problems.append(f"{where}: outcome {spec.outcome!r} has the same value "
                        f"({_number(y_one)}) in every row{label}; there is no variation "
                        "to explain")
    y_full = None
    for name in dict.fromkeys(r.name for r in spec.regressors):
        x_all = frame[name].to_numpy(dtype=np.float64)
        x_missing = np.isnan(x_all)
        x_one = _one_value(x_all, x_missing)
        if x_one is not None:
            problems.append(f"{where}: regressor {name!r} has the same value "
                            f"({_number(x_one)}) in every row{label}; it cannot be told "
                            "apart from the constant: drop it from the model")
            continue
        gaps = x_missing | y_missing
        y_sums = None
        if not gaps.any():  # every row has both: no copies of the columns
            xb, yb = x_all, y_all
            if y_full is None:  # the outcome's shifted sums, shared by the regressors
                y_full = _shifted_sums(y_all)
            y_sums = y_full
        else:
            both = ~gaps
            xb, yb = x_all[both], y_all[both]
        if len(xb) >= 3 and _affine_copy(xb, yb, y_sums):
            how = ("equals" if np.array_equal(xb, yb)
                   else "is an exact linear function of")
            problems.append(f"{where}: regressor {name!r} {how} the outcome "
                            f"{spec.outcome!r} in every row{label}; a regressor cannot be "
                            "the outcome itself: drop it from the model")
    return problems


def _one_value(v: np.ndarray, missing: np.ndarray) -> float | None:
    """The value of every present entry of ``v`` when they are all equal (None when
    two differ or none is present). Two different values among the first few present
    ones decide at once, without a pass over the column."""
    head = v[:256][~missing[:256]]
    if head.size and np.any(head != head[0]):
        return None
    present = v[~missing]
    if present.size and np.all(present == present[0]):
        return float(present[0])
    return None


def _shifted_sums(v: np.ndarray) -> tuple:
    """``(v − v[0], its sum, its sum of squares about the mean)`` of :func:`_affine_copy`."""
    vd = v - v[0]
    s = vd.sum()
    return vd, s, vd @ vd - s * s / len(v)


def _affine_copy(x: np.ndarray, y: np.ndarray, y_sums: tuple | None = None) -> bool:
    """Whether ``x = a + b·y`` holds in every row, to rounding (b ≠ 0).

    Both are centred and scaled to unit spread first, so the check does not depend
    on the units either is measured in; then ``x`` is a copy when its residual on
    ``y`` is below 1e-10 of its own spread."""
    # A copy has correlation ±1: 1 − r² is the mean squared residual of the
    # standardised fit below, at most 1e-20 for a copy. r from five sums of values
    # shifted by their first (no spread lost to a large level) rejects every column
    # far from a copy without the row-by-row residuals; the 1e-6 margin lies far
    # above the rounding of those sums.
    # ``y_sums``: :func:`_shifted_sums` of ``y``, when already at hand
    n = len(x)
    xd, sx_, vx = _shifted_sums(x)
    yd, sy_, vy = _shifted_sums(y) if y_sums is None else y_sums
    if vx <= 0 or vy <= 0:
        return False
    r2 = (xd @ yd - sx_ * sy_ / n) ** 2 / (vx * vy)
    if 1.0 - r2 > 1e-6:
        return False
    xc, yc = x - x.mean(), y - y.mean()
    sx, sy = np.sqrt(np.mean(xc * xc)), np.sqrt(np.mean(yc * yc))
    if sx == 0 or sy == 0:
        return False
    xs, ys = xc / sx, yc / sy
    slope = float(xs @ ys) / float(ys @ ys)
    return bool(np.max(np.abs(xs - slope * ys)) <= 1e-10)


def _number(value: float) -> str:
    return str(int(value)) if float(value).is_integer() else repr(float(value))
