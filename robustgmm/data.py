"""The data layer: read a panel file, validate it, lay it out on the calendar.

A :class:`Panel` holds each used variable as an ``(N units × P periods)`` array on
the full calendar ``periods[0] .. periods[-1]``; a missing unit-period is NaN. Lags
are shifts along the calendar axis, so a gap in a unit's years makes the lag missing
and never borrows the previous row.
"""
from __future__ import annotations

import hashlib
from dataclasses import dataclass
from typing import Mapping

import numpy as np
import pandas as pd

from .errors import InputError


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

    def take_units(self, index) -> "Panel":
        return Panel(self.units[index], self.periods,
                     {k: v[index] for k, v in self.values.items()},
                     self.source, self.data_hash, self.dropped_missing)


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
