"""Readers: the columns a spec needs from a csv, parquet, dta or xlsx file.

Every reader checks the file's own header (before any renaming by pandas, which
turns a second ``x`` into ``x.1``), so a repeated column name is reported, never
read silently.
"""
from __future__ import annotations

from pathlib import Path

import numpy as np
import pandas as pd

from ..errors import InputError
from .validate import _closest, filter_columns, validate_frame

from ..options import DATA_EXTENSIONS as SUPPORTED_EXTENSIONS  # readable file types


def _file_columns(path: Path, kind: str) -> list[str]:
    """The column names as written in the file, repeats kept (pandas would rename a
    second ``x`` to ``x.1``; a header must be read raw to see the repeat)."""
    if kind == ".csv":
        head = _read_csv(path, nrows=1, header=None, dtype=str, keep_default_na=False)
        return [str(c) for c in head.iloc[0].tolist()] if len(head) else []
    if kind == ".parquet":
        import pyarrow.parquet as pq
        return [str(c) for c in pq.read_schema(path).names]
    if kind == ".dta":
        # a read of no rows keeps the stored variable list, repeats included (the
        # .dta format names each variable once; a file from elsewhere may not)
        with pd.read_stata(path, iterator=True, convert_categoricals=False) as reader:
            return [str(c) for c in reader.read(nrows=1).columns]
    if kind == ".xlsx":
        head = pd.read_excel(path, nrows=1, header=None, dtype=str)
        return [str(c) for c in head.iloc[0].tolist()] if len(head) else []
    raise AssertionError(kind)


def _and(numbers) -> str:
    items = [str(n) for n in numbers]
    return items[0] if len(items) == 1 else ", ".join(items[:-1]) + " and " + items[-1]


def repeated_columns(names, needed, where: str, model: str) -> list[str]:
    """One line per needed column whose name appears more than once in the header.

    A repeated name that the model does not use is harmless and not reported."""
    positions: dict[str, list[int]] = {}
    for i, name in enumerate(names, start=1):
        positions.setdefault(name, []).append(i)
    return [f"{where}: column {col!r} appears {len(positions[col])} times in the header "
            f"(columns {_and(positions[col])}); rename all but one "
            f"(the model file {model} uses it)"
            for col in needed if len(positions.get(col, ())) > 1]


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


def _read_csv_fast(path: Path, columns: list) -> pd.DataFrame | None:
    """The columns read by pandas' pyarrow CSV engine (multi-threaded, several times
    faster than the C engine on large files), or None when its frame could differ
    from the C engine's, which then reads the file: pyarrow not installed, a file it
    refuses (ragged rows), a column it typed as anything but numbers or pandas'
    string type (dates, bytes of a file in another encoding, ...), or a text column whose values all read as
    numbers to the C engine (e.g. ``" 7"`` with a space: pyarrow keeps text)."""
    try:
        import pyarrow  # noqa: F401
    except ImportError:
        return None
    try:
        frame = pd.read_csv(path, sep=_csv_separator(path), usecols=list(columns),
                            engine="pyarrow")
    except Exception:  # noqa: BLE001 - the C engine reads it, or reports the problem
        return None
    for name in frame.columns:
        dtype = frame[name].dtype
        if dtype.kind in "iufb":
            continue
        if not isinstance(dtype, pd.StringDtype):
            # dates, times, bytes of another encoding, empty columns: typed
            # differently by the C engine
            return None
        present = frame[name].dropna()
        # a column is text to the C engine when any value is not a number: the
        # first present value decides, except when every value is a number
        if len(present) and not np.isnan(pd.to_numeric(present.iloc[:1], errors="coerce")).all():
            if not pd.to_numeric(present, errors="coerce").isna().any():
                return None
    return frame


def _read(path: Path, kind: str, columns: list) -> pd.DataFrame:
    if kind == ".csv":
        fast = _read_csv_fast(path, columns)
        if fast is not None:
            return fast
        # low_memory=False: each column's type is inferred from the whole column, not
        # chunk by chunk (chunks would mix numbers and text in one column, with a
        # DtypeWarning on stderr, and "007" and 7 would become different ids)
        return _read_csv(path, usecols=lambda c: c in set(columns), low_memory=False)
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
    repeats = repeated_columns(available, needed, where, model)
    if repeats:
        raise InputError(repeats)
    names = set(available)
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


