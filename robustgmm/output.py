"""An audit's output folder: one audit at a time, always complete, no stale files.

* **Lock** (:class:`FolderLock`): an audit (or a report rebuild) holds
  ``.robustgmm-lock`` in the folder for its whole run — a file created exclusively
  (``O_CREAT | O_EXCL``) holding the process id, its start time, the host and the
  command. A second run into the same folder stops with one line naming the holder.
  A lock whose process no longer runs on this host (or whose pid now belongs to a
  process started later) is stale and taken over; a lock from another host is
  never taken over (its process cannot be checked from here).
* **Staging** (:func:`publish`): every file of an audit (tables, verdict, report,
  figures, manifest) is first written into a private staging folder inside the
  output folder, then renamed into place one by one — the old manifest removed
  before the first rename, the new one renamed last. Renames within one file system
  are atomic, so at every instant the folder holds either the old complete audit
  with its manifest, or files being swapped in and no manifest, or the new complete
  audit with its manifest: a manifest never stands beside another audit's files.
  Staging folders of a run that died are removed by the next run (which holds the
  lock, so no live run owns them).
* **Ownership record** (``.robustgmm-output``): robustgmm's mark on a folder it
  writes, listing the files its last audit wrote. A new audit removes the listed
  files it does not write again (figures of terms no longer audited), and nothing
  else: files the user keeps in the folder are never touched. The record is
  updated to the union of old and new files before the swap and to the new files
  after it, so a run killed anywhere leaves a record that covers every file it
  wrote.
"""
from __future__ import annotations

import datetime as _dt
import json
import os
import shutil
import socket
import tempfile
from pathlib import Path
from typing import Callable, Iterable

from . import contract
from .atomic import NotRegularFileError, atomic_write_text
from .errors import InputError

MARKER = ".robustgmm-output"
LOCK = ".robustgmm-lock"
STAGING_PREFIX = ".robustgmm-staging-"
MANIFEST = "manifest.json"
#: The contract files of an audit folder, in the order they are written.
CONTRACT_FILES = contract.FILES
#: The files an audit writes that the report only reads: the contract files, the
#: dropping-units files and the optional Monte Carlo (rebuilding the report keeps them).
AUDIT_DATA_FILES = CONTRACT_FILES + contract.DROPPING_FILES + tuple(contract.SIMULATION_FILES)
#: The report documents written beside them (figures go in ``figures/``).
REPORT_FILES = ("report.html", "report.md", "table.tex", "referee.txt")
#: Every name an audit may write at the top of its folder (inputs must not be there).
OUTPUT_NAMES = frozenset(AUDIT_DATA_FILES + REPORT_FILES
                         + (MARKER, LOCK))
#: A lock file without readable content (its writer died between creating and
#: writing it, microseconds apart) counts as stale after this many seconds.
UNREADABLE_LOCK_SECONDS = 10.0


# ---------------------------------------------------------------------------
# the ownership record
# ---------------------------------------------------------------------------
def read_record(folder) -> dict:
    try:
        data = json.loads((Path(folder) / MARKER).read_text(encoding="utf-8"))
    except (OSError, ValueError):
        return {}
    return data if isinstance(data, dict) else {}


def recorded_files(folder) -> list[str]:
    files = read_record(folder).get("files", [])
    return [f for f in files if isinstance(f, str)] if isinstance(files, list) else []


def write_record(folder, files: Iterable[str] | None = None) -> None:
    """Mark ``folder`` as robustgmm's; ``files``: the files its audit wrote (None
    keeps the list already recorded)."""
    from . import __version__
    record = read_record(folder)
    record.update(created_by="robustgmm", version=__version__)
    if files is not None:
        record["files"] = sorted(set(files))
    record.setdefault("files", [])
    atomic_write_text(Path(folder) / MARKER, json.dumps(record) + "\n")


def _safe_relative(name: str) -> Path | None:
    """A recorded name as a path inside the folder, or None when it is not one
    (absolute, with ``..``, or one of robustgmm's own markers)."""
    rel = Path(name)
    if rel.is_absolute() or ".." in rel.parts or not rel.parts:
        return None
    if rel.parts[0] in (MARKER, LOCK, ".cache") or rel.parts[0].startswith(STAGING_PREFIX):
        return None
    return rel


def remove_stale(folder, old: Iterable[str], new: Iterable[str]) -> list[str]:
    """Remove the files of ``old`` (recorded by an earlier run) that are not in
    ``new``: only regular files inside the folder, then folders left empty."""
    folder = Path(folder)
    keep = set(new)
    removed = []
    for name in sorted(set(old) - keep):
        rel = _safe_relative(name)
        if rel is None:
            continue
        path = folder / rel
        try:
            if path.is_symlink() or not path.is_file():
                continue
            path.unlink()
            removed.append(name)
        except OSError:
            continue
        parent = path.parent
        while parent != folder:
            try:
                parent.rmdir()  # only when empty
            except OSError:
                break
            parent = parent.parent
    return removed


# ---------------------------------------------------------------------------
# the lock
# ---------------------------------------------------------------------------
def _start_time(pid: int) -> str | None:
    """The start time of process ``pid`` in clock ticks since boot (Linux), to tell
    a live holder from an unrelated process that got its pid later."""
    try:
        text = Path(f"/proc/{pid}/stat").read_text()
    except OSError:
        return None
    fields = text[text.rindex(")") + 2:].split()
    return fields[19] if len(fields) > 19 else None


def _alive(pid: int, started: str | None) -> bool:
    try:
        os.kill(pid, 0)
    except ProcessLookupError:
        return False
    except PermissionError:
        pass  # another user's process: it exists
    if started is not None:
        now = _start_time(pid)
        if now is not None and now != started:
            return False  # the pid was reused
    return True


class FolderLock:
    """Exclusive use of an output folder by one run (module docstring, "Lock").

    Re-entrant within a process: a nested lock on a folder this process already
    holds does nothing."""

    _held: dict[str, int] = {}

    def __init__(self, folder, command: str = "audit"):
        self.folder = Path(folder)
        self.path = self.folder / LOCK
        self.command = command
        self._key = str(self.folder.resolve())

    def __enter__(self) -> "FolderLock":
        if self._held.get(self._key):
            self._held[self._key] += 1
            return self
        for _ in range(3):
            if self._try_create():
                self._held[self._key] = 1
                return self
            holder = self._read()
            if not self._stale(holder):
                raise InputError(self._busy_message(holder))
            try:  # a dead run's lock: take it over
                self.path.unlink()
            except FileNotFoundError:
                pass
        raise InputError(self._busy_message(self._read()))

    def __exit__(self, *exc) -> None:
        self._held[self._key] -= 1
        if self._held[self._key]:
            return
        del self._held[self._key]
        holder = self._read() or {}
        if holder.get("pid") == os.getpid() and holder.get("host") == socket.gethostname():
            try:
                self.path.unlink()
            except OSError:
                pass

    def _try_create(self) -> bool:
        content = json.dumps({
            "pid": os.getpid(), "started": _start_time(os.getpid()),
            "host": socket.gethostname(), "command": self.command,
            "since_utc": _dt.datetime.now(_dt.timezone.utc).isoformat(timespec="seconds"),
        }).encode()
        try:
            fd = os.open(self.path, os.O_CREAT | os.O_EXCL | os.O_WRONLY, 0o644)
        except FileExistsError:
            return False
        except OSError as exc:
            raise InputError(f"{self.folder}: cannot create the lock file {LOCK} "
                             f"({exc.strerror or type(exc).__name__})") from None
        try:
            os.write(fd, content)
            os.fsync(fd)
        finally:
            os.close(fd)
        return True

    def _read(self) -> dict | None:
        try:
            data = json.loads(self.path.read_text(encoding="utf-8"))
        except (OSError, ValueError):
            return None
        return data if isinstance(data, dict) else None

    def _stale(self, holder: dict | None) -> bool:
        if holder is None:
            try:
                age = _dt.datetime.now().timestamp() - self.path.stat().st_mtime
            except FileNotFoundError:
                return True
            return age > UNREADABLE_LOCK_SECONDS
        if holder.get("host") != socket.gethostname():
            return False
        pid = holder.get("pid")
        return not (isinstance(pid, int) and _alive(pid, holder.get("started")))

    def _busy_message(self, holder: dict | None) -> str:
        if holder is None:
            who = "another robustgmm run (its lock file is being written)"
        else:
            who = (f"another robustgmm {holder.get('command', 'run')} (pid {holder.get('pid')} "
                   f"on {holder.get('host')}, since {holder.get('since_utc')})")
        return (f"{self.folder}: {who} is writing into this folder; wait for it to finish "
                f"or choose another folder (if that process no longer runs, remove "
                f"{self.path})")


# ---------------------------------------------------------------------------
# staging and the swap
# ---------------------------------------------------------------------------
def remove_stale_staging(folder) -> None:
    """Staging folders left by runs that died (the caller holds the lock)."""
    for path in Path(folder).glob(STAGING_PREFIX + "*"):
        if path.is_dir() and not path.is_symlink():
            shutil.rmtree(path, ignore_errors=True)


def publish(folder, write: Callable[[Path], list[str]]) -> list[str]:
    """Write an audit through a staging folder and swap it into ``folder``.

    ``write(stage)`` writes every file into ``stage`` and returns their paths
    relative to it (``manifest.json`` among them). Returns the names swapped in.
    See the module docstring ("Staging", "Ownership record")."""
    folder = Path(folder)
    with FolderLock(folder):
        remove_stale_staging(folder)
        stage = Path(tempfile.mkdtemp(prefix=STAGING_PREFIX, dir=folder))
        try:
            names = [str(Path(n)) for n in write(stage)]
            old = recorded_files(folder)
            write_record(folder, [*old, *names])
            (folder / MANIFEST).unlink(missing_ok=True)
            for name in names:
                if name != MANIFEST:
                    _move(stage, folder, name)
            remove_stale(folder, old, names)
            if MANIFEST in names:
                _move(stage, folder, MANIFEST)
            write_record(folder, names)
        finally:
            shutil.rmtree(stage, ignore_errors=True)
    return names


def _move(stage: Path, folder: Path, name: str) -> None:
    """Rename ``stage/name`` over ``folder/name``: the entry there (a file, or a
    symlink planted there) is replaced, never followed; a symlinked sub-folder on
    the way is refused, so nothing is ever written outside ``folder``."""
    rel = Path(name)
    here = folder
    for part in rel.parts[:-1]:
        here = here / part
        if here.is_symlink() or (here.exists() and not here.is_dir()):
            raise NotRegularFileError(20, "not a folder of this audit (a symlink or a file)",
                                      str(here))
        here.mkdir(exist_ok=True)
    dst = folder / rel
    if dst.is_dir() and not dst.is_symlink():
        raise IsADirectoryError(21, "a folder is in the way", str(dst))
    os.replace(stage / rel, dst)
