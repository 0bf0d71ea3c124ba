"""The data layer: read a panel file, validate it, lay it out on the calendar.

* :mod:`.readers` — :func:`read_frame`: the columns a spec needs from its data file
  (csv, parquet, dta, xlsx), header checked as written in the file;
* :mod:`.validate` — :func:`validate_frame`: unit and period columns, numeric and
  finite model columns, degenerate columns;
* :mod:`.panel` — :class:`Panel` (read-only ``N × P`` arrays on the calendar),
  :func:`build_panel` (apply a sample filter, lay out), :func:`load_panel` (both).

Every problem found is one line naming the file and the column or value at fault;
all are raised together as :class:`InputError`. Missing values in used columns are
not an error: the rows stay on the calendar as NaN, the estimation drops the
observations they touch, and ``Panel.dropped_missing`` counts those rows.
"""
from __future__ import annotations

from .panel import Panel, apply_sample, build_panel, hash_frame, load_panel, panel_from_frame, periods_needed
from .readers import SUPPORTED_EXTENSIONS, read_frame
from .validate import MAX_CALENDAR, MAX_EXAMPLES, filter_columns, validate_frame

__all__ = ["Panel", "apply_sample", "build_panel", "hash_frame", "load_panel",
           "panel_from_frame", "periods_needed", "SUPPORTED_EXTENSIONS", "read_frame",
           "MAX_CALENDAR", "MAX_EXAMPLES", "filter_columns", "validate_frame"]
