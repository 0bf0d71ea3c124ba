"""The calendar panel: each used variable as an (N units × P periods) array.

A :class:`Panel` holds each variable on the full calendar ``periods[0] ..
periods[-1]``; a missing unit-period is NaN. Lags are shifts along the calendar
axis, so a gap in a unit's years makes the lag missing and never borrows the
previous row. :func:`build_panel` applies a sample filter to a validated frame and
lays it out; :func:`load_panel` reads, validates and lays out in one call.
"""
from __future__ import annotations

import dataclasses
import hashlib
from dataclasses import dataclass
from types import MappingProxyType
from typing import Mapping

import numpy as np
import pandas as pd

from ..errors import InputError
from .validate import _show, _sorted_cells, degenerate_columns, unit_codes, validate_frame


def _read_only(arr) -> np.ndarray:
    arr = np.asarray(arr)
    if arr.flags.writeable:
        arr = arr.view()
        arr.flags.writeable = False
    return arr


@dataclass(frozen=True)
class Panel:
    units: np.ndarray
    periods: np.ndarray
    values: Mapping[str, np.ndarray]
    source: str = "<data>"
    data_hash: str = ""
    dropped_missing: int = 0
    #: One line per column that cannot identify anything on this sample (see
    #: :func:`robustgmm.data.validate.degenerate_columns`). Empty for the base
    #: sample (there it is an input error); a varied sample keeps its panel and
    #: the runner fails its variants with these reasons.
    degenerate: tuple[str, ...] = ()

    def __post_init__(self):
        # Read-only arrays: a panel is shared by every variant of an audit and its
        # data_hash names its content, so nothing may change it in place (a mutated
        # array once doubled an estimate under an unchanged hash). Read-only views,
        # not copies: the caller's own arrays stay writable.
        object.__setattr__(self, "units", _read_only(self.units))
        object.__setattr__(self, "periods", _read_only(self.periods))
        object.__setattr__(self, "values", MappingProxyType(
            {name: _read_only(arr) for name, arr in dict(self.values).items()}))

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
    """sha256 of the used columns of a long frame in canonical (unit, period) order,
    so the hash does not depend on the row order (the Monte Carlo's world key; a
    panel's own ``data_hash`` is :func:`panel_hash` of its arrays)."""
    cols = [unit, period, *[c for c in columns if c not in (unit, period)]]
    canon = frame[cols].sort_values([unit, period], kind="mergesort").reset_index(drop=True)
    digest = hashlib.sha256()
    digest.update(",".join(map(str, cols)).encode())
    digest.update(pd.util.hash_pandas_object(canon, index=False).values.tobytes())
    return digest.hexdigest()


#: Version of the panel hash (:func:`panel_hash`); part of every hash, so a change of
#: what is hashed never meets an old cache entry under the same name.
PANEL_HASH_VERSION = "robustgmm-panel-hash-2"


def _unit_bytes(units: np.ndarray) -> bytes:
    """The sorted unit ids as bytes: numbers as their machine values, text (and any
    other object) through pandas' vectorised 64-bit hash of each id."""
    if units.dtype.kind in "iufb":
        return units.dtype.str.encode() + np.ascontiguousarray(units).tobytes()
    return b"object" + pd.util.hash_array(np.asarray(units, dtype=object),
                                          categorize=False).tobytes()


def panel_hash(units: np.ndarray, periods: np.ndarray, observed: np.ndarray,
               values: Mapping[str, np.ndarray]) -> str:
    """sha256 of a laid-out panel: the used column names, the sorted unit ids, the
    calendar, which unit-period cells have a row in the data, and the bytes of each
    N × P value array (missing cells NaN, one NaN bit pattern).

    The layout is canonical (units sorted, periods on the calendar), so the hash
    does not depend on the row order of the file; the cells with a row record
    which rows exist, so a row whose used values are all missing still counts. Each
    array is hashed once as it lies in memory (no per-row hashing, no sort)."""
    digest = hashlib.sha256()
    digest.update(PANEL_HASH_VERSION.encode())
    digest.update(",".join(map(str, values)).encode())
    digest.update(_unit_bytes(units))
    digest.update(np.ascontiguousarray(periods, dtype=np.int64).tobytes())
    digest.update(np.packbits(observed).tobytes())
    for arr in values.values():  # the array's own buffer, not a copy of it
        digest.update(memoryview(np.ascontiguousarray(arr)).cast("B"))
    return digest.hexdigest()


def _balanced_in_order(units: pd.Series, per: np.ndarray, n_periods: int) -> np.ndarray | None:
    """The sorted distinct ids when whole-number ids and the periods are in strictly
    increasing (unit, period) order and every unit has every one of the ``n_periods``
    periods (then row ``i`` is calendar cell ``i``); else None."""
    if units.dtype.kind not in "iu" or not len(units):
        return None
    ids = units.to_numpy()
    if not _sorted_cells(ids, per):
        return None
    change = ids[1:] != ids[:-1]
    n_units = 1 + int(np.count_nonzero(change))
    if n_units * n_periods != len(ids):
        return None
    return ids[np.concatenate([[0], np.flatnonzero(change) + 1])]


def panel_from_frame(frame: pd.DataFrame, unit: str, period: str, columns,
                     source: str = "<data>") -> Panel:
    """Lay a validated long frame (one row per unit-period) out on the calendar.

    Assumes: no duplicate (unit, period) pairs, integer periods, numeric finite-or-NaN
    values in ``columns``. Units are sorted by id so that the layout does not depend
    on the row order of the file: the one sort of the layout is that of the distinct
    ids (:func:`~robustgmm.data.validate.unit_codes`; none for whole-number ids over
    a narrow range); every column is then one scatter into its
    flat N × P array (a copy for a balanced panel already in that order), and the
    hash reads the arrays (:func:`panel_hash`).
    """
    columns = list(dict.fromkeys(columns))
    if frame.empty:
        raise InputError(f"{source}: no rows left to estimate on")
    per = frame[period].to_numpy().astype(np.int64, copy=False)
    p0, p1 = int(per.min()), int(per.max())
    periods = np.arange(p0, p1 + 1, dtype=np.int64)
    n_periods = len(periods)
    # a balanced panel sorted by unit and period (the usual file) fills every cell
    # in order (cell == arange), so each column is a copy, not a scatter; with
    # whole-number ids that is told without the unit codes
    unit_ids = _balanced_in_order(frame[unit], per, n_periods)
    in_order = unit_ids is not None
    if not in_order:
        codes, unit_ids = unit_codes(frame[unit])
        cell = codes.astype(np.int64) * n_periods + (per - p0)
        in_order = len(cell) == len(unit_ids) * n_periods and bool(np.all(cell[1:] > cell[:-1]))
    n_units = len(unit_ids)
    if in_order:
        observed = np.ones(n_units * n_periods, dtype=bool)
    else:
        observed = np.zeros(n_units * n_periods, dtype=bool)
        observed[cell] = True
    values = {}
    n_missing_rows = np.zeros(len(frame), dtype=bool)
    for name in columns:
        if in_order:
            arr = frame[name].to_numpy(dtype=np.float64, copy=True)
            missing = np.isnan(arr)
            if missing.any():  # one NaN bit pattern, whatever the reader left
                arr[missing] = np.nan
        else:
            col = frame[name].to_numpy(dtype=np.float64)
            missing = np.isnan(col)
            arr = np.full(n_units * n_periods, np.nan)
            arr[cell] = col
            if missing.any():  # one NaN bit pattern, whatever the reader left
                arr[cell[missing]] = np.nan
        n_missing_rows |= missing
        values[name] = arr.reshape(n_units, n_periods)
    units = np.asarray(unit_ids)
    return Panel(
        units=units,
        periods=periods,
        values=values,
        source=source,
        data_hash=panel_hash(units, periods, observed, values),
        dropped_missing=int(n_missing_rows.sum()),
    )


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
    """Keep periods in ``[period_from, period_to]``, drop every unit with any row
    whose ``exclude_column`` value is in ``exclude_values`` and keep only the units
    whose observed ``keep_column`` values are all in ``keep_values``."""
    if sample is None or sample.is_full:
        return frame
    label = f"sample {sample.name!r}"
    for kind, col in (("exclude", sample.exclude_column), ("keep", sample.keep_column),
                      ("split", sample.split)):
        if col is not None and col not in frame.columns:
            raise InputError(f"{where}: {label}: {kind} column {col!r} not found")
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
    if sample.keep_column is not None:
        # a subgroup: units whose observed values are all listed (missing ones ignored)
        column = frame[sample.keep_column]
        hit, absent = _exclude_mask(column, sample.keep_values)
        if len(absent) == len(sample.keep_values):
            raise InputError(
                f"{where}: {label}: none of the kept values "
                f"{', '.join(_show(v) for v in sample.keep_values)} occurs in column "
                f"{sample.keep_column!r}; the subgroup would be empty")
        outside = ~hit & column.notna().to_numpy()
        bad_units = pd.unique(frame.loc[outside, spec.unit])
        keep &= ~frame[spec.unit].isin(bad_units).to_numpy()
        keep &= frame[spec.unit].isin(pd.unique(frame.loc[hit, spec.unit])).to_numpy()
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
    degenerate = [] if problems else degenerate_columns(sub, spec, where, label)
    if sample == spec.sample:  # the model's own sample: bad input
        problems += degenerate
        degenerate = []
    if problems:
        raise InputError(problems)
    panel = panel_from_frame(sub, spec.unit, spec.period, spec.used_columns(), source=where)
    if degenerate:
        panel = dataclasses.replace(panel, degenerate=tuple(degenerate))
    return panel


def load_panel(spec, sample=None) -> Panel:
    """Read, validate and lay out the data of ``spec`` (``read_frame`` + ``build_panel``)."""
    from .readers import read_frame

    frame = read_frame(spec, samples=None if sample is None else (sample,))
    return build_panel(frame, spec, sample=sample)
