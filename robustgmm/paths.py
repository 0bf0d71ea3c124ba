"""The paths given on the command line, checked before anything is written: the
model file, the output folder (``--out``: refused when it holds someone else's
files, unless ``--force``), the ``fit --json`` file, and an audit that would
overwrite its own inputs. Each problem is one :class:`~robustgmm.errors.InputError`
line naming the path; the command line (:mod:`robustgmm.cli`) prints it.
"""
from __future__ import annotations

import json
import os
from pathlib import Path

from .errors import InputError

#: Written into an output folder as soon as robustgmm starts using it, so that a
#: rerun of an interrupted audit (no manifest.json yet) is recognised as ours. The
#: same word as robustgmm.output.MARKER, written out so that the checks run before
#: output (which imports pandas through the folder contract) is imported.
OUTPUT_MARKER = ".robustgmm-output"
#: The lock and the staging-folder prefix of robustgmm.output (LOCK, STAGING_PREFIX).
OUTPUT_LOCK = ".robustgmm-lock"
OUTPUT_STAGING_PREFIX = ".robustgmm-staging-"


def check_model_path(path: str) -> Path:
    p = Path(path)
    if p.suffix.lower() in (".csv", ".parquet", ".dta", ".xlsx") and p.is_file():
        raise InputError(f"{path}: this is a data file; pass the model file (.toml) that names it")
    return p


def check_name_length(path, what: str) -> None:
    """A path whose folder or file names the file system cannot hold (255 bytes per
    name on common file systems), as one line before anything is written."""
    try:
        limit = os.pathconf(".", "PC_NAME_MAX")
    except (OSError, ValueError, AttributeError):
        limit = 255
    for part in Path(path).parts:
        size = len(part.encode("utf-8", "surrogateescape"))
        if size > limit:
            shown = part if len(part) <= 40 else part[:37] + "..."
            raise InputError(f"{shown}: {what} names a file or folder of {size} bytes; the "
                             f"file system allows at most {limit}: choose a shorter name")


def check_output_folder(path: str, force: bool, what: str = "--out") -> Path:
    """Create (or accept) an output folder and check that it can be written.

    Refuses a non-empty folder that holds neither an audit (``manifest.json``) nor
    the marker robustgmm leaves when it starts using a folder, unless ``force``.
    """
    check_name_length(path, what)
    out = Path(path)
    if out.exists() and not out.is_dir():
        raise InputError(f"{path}: {what} must be a folder; this is a file")
    if out.is_dir():
        try:
            entries = [e.name for e in out.iterdir()]
        except OSError as exc:
            raise InputError(f"{path}: cannot read the {what} folder ({exc.strerror or exc})") from None
        ours = OUTPUT_MARKER in entries or (
            "manifest.json" in entries and _is_our_manifest(out / "manifest.json")) or (
            entries and all(_in_progress_name(e) for e in entries))
        if entries and not ours and not force:
            raise InputError(
                f"{path}: folder exists, is not empty and holds no robustgmm output; "
                "choose a new folder or add --force to write into it")
    else:
        try:
            out.mkdir(parents=True)
        except OSError as exc:
            raise InputError(f"{path}: cannot create the {what} folder "
                             f"({exc.strerror or type(exc).__name__})") from None
    try:  # os.access is not reliable (e.g. for root or on network drives): try a write
        from .output import write_record
        write_record(out)
    except OSError as exc:
        raise InputError(f"{path}: cannot write into the {what} folder "
                         f"({exc.strerror or type(exc).__name__})") from None
    return out


def _in_progress_name(name: str) -> bool:
    """A file robustgmm creates in a folder it is starting to use, before its marker is
    in place: the marker's temporary file (robustgmm.atomic: ``.<name>.<random>.tmp``,
    renamed a moment later), the lock and a staging folder. A second audit started at
    the same moment must see such a folder as robustgmm's, so that the lock (not this
    check) decides which of the two runs."""
    return ((name.startswith(f".{OUTPUT_MARKER}.") and name.endswith(".tmp"))
            or name == OUTPUT_LOCK or name.startswith(OUTPUT_STAGING_PREFIX))


def _is_our_manifest(path: Path) -> bool:
    """True when ``path`` is the manifest of a robustgmm audit (a web project or
    another tool may well have a ``manifest.json`` of its own)."""
    try:
        data = json.loads(path.read_text(encoding="utf-8"))
    except (OSError, ValueError):
        return False
    return isinstance(data, dict) and data.get("package") == "robustgmm"


def cannot_write(folder, exc: OSError) -> InputError:
    """A failed output write (full disk, read-only or vanished folder) as one line.
    The writers are atomic, so no half-written file is left behind."""
    where = f" ({Path(exc.filename).name})" if getattr(exc, "filename", None) else ""
    return InputError(f"{folder}: cannot write the output files{where}: "
                      f"{exc.strerror or type(exc).__name__}; "
                      "files already there were left as they were")


#: ``--json -``: write the JSON to standard output instead of a file.
STDOUT = "-"


def check_json_path(path: str, protected=()) -> Path | None:
    """The file ``fit --json`` may write (None for ``-``, standard output).

    Only a regular file (or a new name) in an existing-or-creatable folder is
    replaced: a device, a pipe, a symlink or a folder is refused (replacing
    ``/dev/null`` or ``/dev/stdout`` by a file was a bug), and so is a path that is
    one of ``protected`` (the model and data files) or inside an audit's cache."""
    if path == STDOUT:
        return None
    check_name_length(path, "--json")
    out = Path(path)
    from .atomic import not_regular
    kind = not_regular(out)
    if kind == "folder":
        raise InputError(f"{path}: --json must name a file; this is a folder")
    if kind is not None:
        raise InputError(f"{path}: --json would replace {kind}, not a regular file; name a "
                         f"new or regular file (or use --json {STDOUT} for standard output)")
    parent = out.parent
    while not parent.exists() and parent != parent.parent:
        parent = parent.parent
    if parent.exists() and not parent.is_dir():
        raise InputError(f"{path}: --json cannot be written: {parent} is a file, not a folder")
    _refuse_inputs(out, protected, "--json")
    if _inside_audit_cache(out):
        raise InputError(f"{path}: --json points inside the cache of an audit; "
                         "write it somewhere else")
    return out


def _same_file(a: Path, b: Path) -> bool:
    try:
        return a.exists() and b.exists() and os.path.samefile(a, b)
    except OSError:
        return False


def _refuse_inputs(target: Path, protected, what: str) -> None:
    """An output path must never be one of the inputs (model file, data file)."""
    for label, path in protected:
        if path is not None and _same_file(target, Path(path)):
            raise InputError(f"{target}: {what} would overwrite the {label} {path}; "
                             "choose another output")


def _inside_audit_cache(path: Path) -> bool:
    """Whether ``path`` lies in the ``.cache`` folder of a robustgmm output folder."""
    try:
        resolved = path.resolve()
    except (OSError, RuntimeError):
        return False
    for folder in [resolved, *resolved.parents]:
        if folder.name == ".cache" and (
                (folder.parent / OUTPUT_MARKER).exists()
                or _is_our_manifest(folder.parent / "manifest.json")):
            return True
    return False


def check_audit_inputs(out: Path, spec, model: Path) -> None:
    """Refuse an ``--out`` folder where an audit would overwrite or delete an input:
    the model or data file at the place of an output file (``bounds.csv``, a report
    document, anything under ``figures/`` or ``.cache/``), or a folder inside the
    cache of another audit."""
    from .output import OUTPUT_NAMES
    if _inside_audit_cache(out):
        raise InputError(f"{out}: --out is inside the cache of another audit; "
                         "choose another folder")
    for label, path in (("model file", model), ("data file", spec.data_file)):
        if path is None:
            continue
        try:
            rel = Path(path).resolve().relative_to(out.resolve())
        except (ValueError, OSError, RuntimeError):
            continue
        if rel.parts and (str(rel) in OUTPUT_NAMES or rel.parts[0] in ("figures", ".cache")):
            raise InputError(f"{path}: the audit would overwrite the {label} ({rel} is one "
                             f"of its output files in {out}); move the {label} or choose "
                             "another --out folder")
