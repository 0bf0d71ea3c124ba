"""Atomic output: every file is written to a temporary sibling and renamed.

A failed write (full disk, read-only folder, interrupt) therefore never leaves a
half-written output behind; readers see either the old file or the new one.
"""
from __future__ import annotations

import json
import os
import stat
import tempfile
from pathlib import Path


class NotRegularFileError(OSError):
    """The path holds something other than a regular file (a device, a pipe, a
    symlink, a folder): an atomic write would replace it, so it is refused."""


def not_regular(path) -> str | None:
    """What ``path`` is when it exists and is not a regular file ("a symlink", "a
    device", "a pipe", "a socket", "folder"); None for a regular file or no file."""
    try:
        mode = os.lstat(path).st_mode
    except FileNotFoundError:
        return None
    except OSError:  # e.g. a name too long: the write will say so
        return None
    if stat.S_ISREG(mode):
        return None
    if stat.S_ISLNK(mode):
        return "a symlink"
    if stat.S_ISDIR(mode):
        return "folder"
    if stat.S_ISCHR(mode) or stat.S_ISBLK(mode):
        return "a device"
    if stat.S_ISFIFO(mode):
        return "a pipe"
    return "a special file"


def _umask() -> int:
    mask = os.umask(0)
    os.umask(mask)
    return mask


def atomic_write_bytes(path, data: bytes) -> Path:
    """Write ``data`` to a temporary sibling of ``path`` and rename it into place.

    Only a regular file (or a new name) is replaced: renaming over a device, pipe or
    symlink would replace that entry with a file (as root, ``/dev/null``), so such a
    path raises :class:`NotRegularFileError`."""
    path = Path(path)
    kind = not_regular(path)
    if kind is not None:
        raise NotRegularFileError(21 if kind == "folder" else 1,
                                  f"{'a folder' if kind == 'folder' else kind} is in the way, "
                                  "not a regular file", str(path))
    path.parent.mkdir(parents=True, exist_ok=True)
    fd, tmp = tempfile.mkstemp(prefix=f".{path.name}.", suffix=".tmp", dir=path.parent)
    try:
        # mkstemp creates the file private (0600); give it the permissions an ordinary
        # open() would, so a shared report stays readable by others
        os.fchmod(fd, 0o666 & ~_umask())
        with os.fdopen(fd, "wb") as handle:
            handle.write(data)
            handle.flush()
            os.fsync(handle.fileno())
        os.replace(tmp, path)
    except BaseException:
        try:
            os.unlink(tmp)
        except FileNotFoundError:
            pass
        raise
    return path


def atomic_write_text(path, text: str) -> Path:
    return atomic_write_bytes(path, text.encode("utf-8"))


def _json_default(value):
    # numpy scalars and arrays reach the writers through results objects
    if hasattr(value, "tolist"):
        return value.tolist()
    if isinstance(value, Path):
        return str(value)
    raise TypeError(f"cannot write {type(value).__name__} as JSON")


def to_json_text(obj) -> str:
    return json.dumps(obj, indent=2, sort_keys=False, default=_json_default, allow_nan=True) + "\n"


def atomic_write_json(path, obj) -> Path:
    return atomic_write_text(path, to_json_text(obj))


def atomic_write_csv(path, frame) -> Path:
    # repr-exact floats so that a reread equals what was computed
    return atomic_write_text(path, frame.to_csv(index=False, float_format="%.17g", lineterminator="\n"))
