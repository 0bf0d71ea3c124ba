"""The data layer: read a panel file, validate it, lay it out on the calendar.

A :class:`Panel` holds each used variable as an ``(N units × P periods)`` array on
the full calendar ``periods[0] .. periods[-1]``; a missing unit-period is NaN. Lags
are shifts along the calendar axis, so a gap in a unit's years makes the lag missing
and never borrows the previous row.

Entry points: :func:`read_frame` (read and validate the file named in a spec),
:func:`build_panel` (validate a frame, apply a sample filter, lay it out),
:func:`load_panel` (both). Every problem found is one line naming the file and the
column or value at fault; all are raised together as :class:`InputError`.
Missing values in used columns are not an error: the rows stay on the calendar as
NaN, the estimation drops the observations they touch, and
``Panel.dropped_missing`` counts those rows.
"""
from __future__ import annotations

import difflib
import hashlib
from dataclasses import dataclass
from pathlib import Path
from typing import Any, Callable, Mapping

import numpy as np
import pandas as pd

from ..errors import InputError
from ..options import DATA_EXTENSIONS as SUPPORTED_EXTENSIONS  # readable file types

#: How many examples a message lists (duplicate rows, bad values).
MAX_EXAMPLES = 3
#: Widest calendar accepted: the panel is laid out on every integer between the
#: first and the last period, so a period column holding e.g. day numbers or
#: YYYYMMDD dates would make enormous, almost empty arrays.
MAX_CALENDAR = 2000


@dataclass(frozen=True)
class Panel:
    units: np.ndarray
    periods: np.ndarray
    values: Mapping[str, np.ndarray]
    source: str = "<data>"
    data_hash: str = ""
    dropped_missing: int = 0

    @property
    def n_units(self) -> int:
        return len(self.units)

    @property
    def n_periods(self) -> int:
        return len(self.periods)

    def lagged(self, name: str, lag: int) -> np.ndarray:
        """``name`` lagged ``lag`` periods on the calendar (NaN where unavailable)."""
        arr = self.values[name]
        if lag == 0:
            return arr
        out = np.full_like(arr, np.nan)
        if lag > 0:
            if lag < arr.shape[1]:
                out[:, lag:] = arr[:, :-lag]
        else:
            if -lag < arr.shape[1]:
                out[:, :lag] = arr[:, -lag:]
        return out


def hash_frame(frame: pd.DataFrame, unit: str, period: str, columns) -> str:
    """sha256 of the used columns in canonical (unit, period) order, so the hash
    does not depend on the row order of the file."""
    cols = [unit, period, *[c for c in columns if c not in (unit, period)]]
    canon = frame[cols].sort_values([unit, period], kind="mergesort").reset_index(drop=True)
    digest = hashlib.sha256()
    digest.update(",".join(map(str, cols)).encode())
    digest.update(pd.util.hash_pandas_object(canon, index=False).values.tobytes())
    return digest.hexdigest()


def panel_from_frame(frame: pd.DataFrame, unit: str, period: str, columns,
                     source: str = "<data>") -> Panel:
    """Lay a validated long frame (one row per unit-period) out on the calendar.

    Assumes: no duplicate (unit, period) pairs, integer periods, numeric finite-or-NaN
    values in ``columns``. Units are sorted by id so that the layout does not depend
    on the row order of the file.
    """
    columns = list(dict.fromkeys(columns))
    if frame.empty:
        raise InputError(f"{source}: no rows left to estimate on")
    unit_codes, unit_ids = pd.factorize(frame[unit], sort=True)
    per = frame[period].to_numpy().astype(np.int64)
    p0, p1 = int(per.min()), int(per.max())
    periods = np.arange(p0, p1 + 1, dtype=np.int64)
    col_idx = per - p0
    values = {}
    n_missing_rows = np.zeros(len(frame), dtype=bool)
    for name in columns:
        col = frame[name].to_numpy(dtype=np.float64)
        n_missing_rows |= np.isnan(col)
        arr = np.full((len(unit_ids), len(periods)), np.nan)
        arr[unit_codes, col_idx] = col
        values[name] = arr
    return Panel(
        units=np.asarray(unit_ids),
        periods=periods,
        values=values,
        source=source,
        data_hash=hash_frame(frame, unit, period, columns),
        dropped_missing=int(n_missing_rows.sum()),
    )


# ---------------------------------------------------------------------------
# helpers
# ---------------------------------------------------------------------------
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
        if s is not None and s.exclude_column is not None:
            cols[s.exclude_column] = None
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


# ---------------------------------------------------------------------------
# reading
# ---------------------------------------------------------------------------
def _file_columns(path: Path, kind: str) -> list:
    if kind == ".csv":
        head = _read_csv(path, nrows=0)
        return list(head.columns)
    if kind == ".parquet":
        import pyarrow.parquet as pq
        return list(pq.read_schema(path).names)
    if kind == ".dta":
        with pd.read_stata(path, iterator=True) as reader:
            return list(reader.variable_labels())
    if kind == ".xlsx":
        return list(pd.read_excel(path, nrows=0).columns)
    raise AssertionError(kind)


def _read_csv(path: Path, **kw) -> pd.DataFrame:
    # Files saved by spreadsheets in a non-UTF-8 code page are common; latin-1 reads
    # any byte sequence, and ids/column names then still compare consistently.
    kw.setdefault("sep", _csv_separator(path))
    try:
        return pd.read_csv(path, **kw)
    except UnicodeDecodeError:
        return pd.read_csv(path, encoding="latin-1", **kw)


def _csv_separator(path: Path) -> str:
    """"," unless the header is one field holding ";" or tabs (a file saved with a
    semicolon or tab separator under a .csv name)."""
    try:
        head = pd.read_csv(path, nrows=0)
    except UnicodeDecodeError:
        head = pd.read_csv(path, nrows=0, encoding="latin-1")
    if head.shape[1] == 1:
        for sep in (";", "\t"):
            if sep in str(head.columns[0]):
                return sep
    return ","


def _read(path: Path, kind: str, columns: list) -> pd.DataFrame:
    if kind == ".csv":
        return _read_csv(path, usecols=lambda c: c in set(columns))
    if kind == ".parquet":
        return pd.read_parquet(path, columns=columns)
    if kind == ".dta":
        # .dta value labels are not applied: filters compare the stored codes.
        return pd.read_stata(path, columns=columns, convert_categoricals=False)
    if kind == ".xlsx":
        return pd.read_excel(path, usecols=lambda c: c in set(columns))
    raise AssertionError(kind)


def _reader_failure(exc: Exception) -> str:
    text = str(exc).strip().splitlines()
    return text[0] if text else type(exc).__name__


def read_frame(spec, samples=None) -> pd.DataFrame:
    """Read the columns a spec needs from its data file and validate them.

    Reads the unit and period columns, ``spec.used_columns()`` and the columns of
    the base and varied sample filters (``samples`` overrides the varied ones).
    Returns a frame with float64 model columns and int64 periods, whose
    ``attrs`` remember how to name rows in later messages.
    """
    model = spec.source
    if spec.data_file is None:
        raise InputError(f"{model}: [data] file is not set; name the panel data file")
    path = Path(spec.data_file)
    where = str(path)
    kind = path.suffix.lower()
    if kind not in SUPPORTED_EXTENSIONS:
        raise InputError(f"{where}: unsupported file type {kind or '(no extension)'} "
                         f"([data] file in {model}); use " + ", ".join(SUPPORTED_EXTENSIONS))
    if not path.exists():
        raise InputError(f"{where}: data file not found ([data] file in {model})")
    if path.is_dir():
        raise InputError(f"{where}: is a folder, not a data file ([data] file in {model})")

    try:
        size = path.stat().st_size
    except OSError as exc:
        raise InputError(f"{where}: cannot read the data file ({exc.strerror or exc})") from None
    if size == 0:
        raise InputError(f"{where}: the data file is empty")
    samples = spec.vary.samples if samples is None else samples
    needed = list(dict.fromkeys([spec.unit, spec.period, *spec.used_columns(),
                                 *filter_columns(spec, samples)]))
    try:
        available = _file_columns(path, kind)
    except MemoryError:
        raise
    except Exception as exc:  # any reader failure is a property of the user's file
        raise InputError(f"{where}: cannot read as {kind[1:]}: {_reader_failure(exc)}") from None
    names = {str(c) for c in available}
    missing = [c for c in needed if c not in names]
    if missing:
        problems = []
        for col in missing:
            hint = _closest(col, names)
            problems.append(f"{where}: column {col!r} not found"
                            + (f" (did you mean {hint!r}?)" if hint else "")
                            + f"; it is named in {model}")
        raise InputError(problems)
    try:
        frame = _read(path, kind, needed)
    except MemoryError:
        raise
    except Exception as exc:
        raise InputError(f"{where}: cannot read as {kind[1:]}: {_reader_failure(exc)}") from None
    frame = frame.reset_index(drop=True)
    frame.attrs["robustgmm_source"] = where
    # csv: line 1 is the header; xlsx: sheet row 1 is the header; others: 1-based rows
    frame.attrs["robustgmm_row_word"] = "line" if kind == ".csv" else "row"
    frame.attrs["robustgmm_row_offset"] = 2 if kind in (".csv", ".xlsx") else 1
    return validate_frame(frame, spec, source=where, samples=samples)


# ---------------------------------------------------------------------------
# validation
# ---------------------------------------------------------------------------
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
    out = frame[needed].copy()

    # unit ids: present; one type so that sorting works
    units = out[spec.unit]
    if units.isna().any():
        first = units.index[units.isna().to_numpy()][0]
        n = int(units.isna().sum())
        problems.append(f"{where}: unit column {spec.unit!r} is empty at {row(first)}"
                        + (f" and {n - 1} more rows" if n > 1 else ""))
    elif units.dtype == object or isinstance(units.dtype, pd.CategoricalDtype):
        kinds = {type(v) for v in units}
        if len(kinds) > 1 or isinstance(units.dtype, pd.CategoricalDtype):
            out[spec.unit] = units.astype(str)

    # periods: whole numbers
    per = out[spec.period]
    per_num = _numeric(per, spec.period, where, row, problems, "period column")
    if per_num is not None:
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
                span = int(ints.max() - ints.min()) + 1
                months = ints % 100
                if (ints.min() >= 100001 and ints.max() <= 999912 and months.min() >= 1
                        and months.max() <= 12 and ints.max() // 100 > ints.min() // 100):
                    problems.append(
                        f"{where}: period column {spec.period!r} looks like year-month codes "
                        f"({ints.min()} to {ints.max()}); lags are taken between consecutive "
                        "whole numbers, so use a running period number instead")
                elif span > MAX_CALENDAR:
                    problems.append(
                        f"{where}: period column {spec.period!r} runs from {ints.min()} to "
                        f"{ints.max()} ({span} periods on the calendar); lags are taken "
                        "between consecutive whole numbers, so use years or a running "
                        "period number")

    # duplicate unit-period rows
    if not problems:
        dup = out.duplicated([spec.unit, spec.period], keep=False)
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
        inf = np.isinf(num.to_numpy())
        if inf.any():
            first = num.index[inf][0]
            problems.append(f"{where}: column {col!r} holds an infinite value "
                            f"({num[first]}) at {row(first)}"
                            + (f" and {int(inf.sum()) - 1} more" if inf.sum() > 1 else ""))
            continue
        if num.isna().all():
            problems.append(f"{where}: column {col!r} is missing in every row")
            continue
        out[col] = num
    if problems:
        raise InputError(problems)
    out.attrs.update(attrs)
    out.attrs["robustgmm_validated"] = True
    return out


# ---------------------------------------------------------------------------
# sample filters and the panel
# ---------------------------------------------------------------------------
def _exclude_mask(column: pd.Series, values) -> tuple[np.ndarray, list]:
    """Rows whose value is one of ``values``; also the values that never occur.

    Numbers compare numerically (a TOML 7 matches 7.0 and "7" in a text column);
    text compares as text.
    """
    hit = np.zeros(len(column), dtype=bool)
    absent = []
    numeric = pd.api.types.is_numeric_dtype(column.dtype) and not pd.api.types.is_bool_dtype(column.dtype)
    as_num = column.to_numpy(dtype=np.float64) if numeric else None
    as_text = None if numeric else column.astype(str).str.strip().to_numpy()
    for v in values:
        if numeric:
            try:
                target = float(v)
            except (TypeError, ValueError):
                absent.append(v)
                continue
            m = as_num == target
        else:
            m = as_text == str(v).strip()
            if not m.any() and isinstance(v, (int, float)):
                # a float-looking text column ("7.0") against a TOML 7
                nums = pd.to_numeric(column, errors="coerce").to_numpy(dtype=np.float64)
                m = nums == float(v)
        if not m.any():
            absent.append(v)
        hit |= m
    return hit, absent


def apply_sample(frame: pd.DataFrame, spec, sample, where: str) -> pd.DataFrame:
    """Keep periods in ``[period_from, period_to]`` and drop every unit with any row
    whose ``exclude_column`` value is in ``exclude_values``."""
    if sample is None or sample.is_full:
        return frame
    label = f"sample {sample.name!r}"
    if sample.exclude_column is not None and sample.exclude_column not in frame.columns:
        raise InputError(f"{where}: {label}: exclude column {sample.exclude_column!r} not found")
    keep = np.ones(len(frame), dtype=bool)
    per = frame[spec.period].to_numpy()
    if sample.period_from is not None:
        keep &= per >= sample.period_from
    if sample.period_to is not None:
        keep &= per <= sample.period_to
    if sample.exclude_column is not None:
        hit, absent = _exclude_mask(frame[sample.exclude_column], sample.exclude_values)
        if len(absent) == len(sample.exclude_values):
            raise InputError(
                f"{where}: {label}: none of the excluded values "
                f"{', '.join(_show(v) for v in sample.exclude_values)} occurs in column "
                f"{sample.exclude_column!r}; the filter would remove nothing")
        bad_units = pd.unique(frame.loc[hit, spec.unit])
        keep &= ~frame[spec.unit].isin(bad_units).to_numpy()
    out = frame[keep]
    if len(out) == 0:
        lo, hi = int(per.min()), int(per.max())
        raise InputError(f"{where}: {label} leaves no rows (the data runs from "
                         f"{lo} to {hi})")
    return out


def periods_needed(spec) -> int:
    """Fewest calendar periods on which one transformed equation can be formed.

    The differenced equation at t uses the outcome and regressors back to
    t - (max lag + 1) and instruments back to t - first_lag, so it needs
    max(max lag + 1, first_lag) + 1 periods (Arellano & Bond 1991, section 2).
    """
    return max(spec.max_lag() + 1, spec.first_lag) + 1


def build_panel(frame: pd.DataFrame, spec, sample=None) -> Panel:
    """Validate ``frame``, apply ``sample`` (default ``spec.sample``), lay it out.

    Raises :class:`InputError` for data problems (see :func:`validate_frame`), a
    sample that leaves no rows, a single period, too few periods for the lags,
    or a model column with no value left in the sample.
    """
    where = frame.attrs.get("robustgmm_source") or spec.source
    sample = spec.sample if sample is None else sample
    if not frame.attrs.get("robustgmm_validated"):
        frame = validate_frame(frame, spec, source=where,
                               samples=(sample,) if sample is not spec.sample else None)
    sub = apply_sample(frame, spec, sample, where)
    label = "" if sample.is_full else f" in sample {sample.name!r}"
    problems = []
    per = sub[spec.period].to_numpy()
    lo, hi = int(per.min()), int(per.max())
    need = periods_needed(spec)
    if lo == hi:
        problems.append(f"{where}: only one period ({lo}){label}; a dynamic panel model "
                        f"needs at least {need} consecutive periods")
    elif hi - lo + 1 < need:
        problems.append(f"{where}: {hi - lo + 1} periods ({lo}-{hi}){label} are too few for "
                        f"the requested lags (outcome and regressor lags up to "
                        f"{spec.max_lag()}, first_lag = {spec.first_lag}): at least "
                        f"{need} are needed")
    for col in spec.used_columns():
        if sub[col].isna().all():
            problems.append(f"{where}: column {col!r} is missing in every row{label}")
    if problems:
        raise InputError(problems)
    return panel_from_frame(sub, spec.unit, spec.period, spec.used_columns(), source=where)


def load_panel(spec, sample=None) -> Panel:
    """Read, validate and lay out the data of ``spec`` (``read_frame`` + ``build_panel``)."""
    frame = read_frame(spec, samples=None if sample is None else (sample,))
    return build_panel(frame, spec, sample=sample)
