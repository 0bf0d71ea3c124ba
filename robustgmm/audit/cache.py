"""The variant cache: one checksummed JSON file per variant, named by what
determines its result.

The key (:meth:`Cache.key`) hashes the data (the panel's content hash), the
variant's canonical estimation settings, the instrument windows of its share group,
the cache format, and the versions of robustgmm, numpy and scipy: a rerun after an
upgrade of any of them recomputes (the numerical libraries move results in the last
digits). Each entry also carries those inputs, so it says what it was computed
from. The file stores the variant's payload (the fit's one record,
``FitResult.to_dict()``, and its bounds, or its ``FitFailure`` record; written by
:mod:`robustgmm.audit.runner`, documented in ``docs/formats.md``) with a sha256 of
its canonical text; an entry that does not parse, whose key or checksum does not
match, is treated as missing and recomputed (and counted as corrupted). The cache is a convenience for resuming, not
a security boundary: an entry edited with a recomputed checksum is not detected.
Entries are written atomically; a write that fails (full disk, read-only folder) is
counted and skipped, the result itself is kept.
"""
from __future__ import annotations

import hashlib
import json
from pathlib import Path
from typing import Any

import numpy as np
import scipy

from .. import __version__
from ..atomic import atomic_write_text
from .grid import canonical_json, canonical_settings

#: 3: records hold the long-run effects; 4: the payload holds ``FitResult.to_dict()``
#: (the one record of a fit) or a ``FitFailure`` record (docs/formats.md, "The variant
#: cache")
CACHE_FORMAT = 4


def environment() -> dict:
    """The package and library versions a cached result depends on."""
    return {"robustgmm": __version__, "numpy": np.__version__, "scipy": scipy.__version__}


class Cache:
    """One checksummed JSON file per variant (see the module docstring)."""

    def __init__(self, directory):
        self.directory = Path(directory)
        self.directory.mkdir(parents=True, exist_ok=True)
        self.corrupted = 0
        self.write_errors = 0

    @staticmethod
    def key(data_hash: str, spec, group: Any = None) -> str:
        """sha256 of the data hash, the canonical settings, the versions
        (:func:`environment`) and ``group``: what else the result depends on (the instrument windows of the
        share group it was estimated with; see :func:`_group_signature`)."""
        text = canonical_json({"format": CACHE_FORMAT, "environment": environment(),
                               "data": data_hash, "settings": canonical_settings(spec),
                               "group": group})
        return hashlib.sha256(text.encode()).hexdigest()

    def path(self, key: str) -> Path:
        return self.directory / f"{key}.json"

    def load(self, key: str) -> dict | None:
        path = self.path(key)
        try:
            raw = path.read_bytes()
        except FileNotFoundError:
            return None
        except OSError:  # e.g. a folder in its place
            self.corrupted += 1
            return None
        try:
            entry = json.loads(raw.decode("utf-8"))  # garbage bytes: UnicodeDecodeError
            payload = entry["payload"]
            ok = (entry.get("key") == key and entry.get("format") == CACHE_FORMAT
                  and entry.get("sha256") == _checksum(payload))
        except (ValueError, KeyError, TypeError, AttributeError):
            ok = False
        if not ok:
            self.corrupted += 1  # recomputed and overwritten by the caller
            return None
        return payload

    def store_quietly(self, key: str, variant_id: str, payload: dict) -> bool:
        """:meth:`store`, but a failed write (full disk, read-only folder) is only
        counted: the cache serves resumption, the result itself is not lost."""
        try:
            self.store(key, variant_id, payload)
        except OSError:
            self.write_errors += 1
            return False
        return True

    def store(self, key: str, variant_id: str, payload: dict) -> None:
        entry = {"format": CACHE_FORMAT, "key": key, "environment": environment(),
                 "variant": variant_id, "sha256": _checksum(payload), "payload": payload}
        atomic_write_text(self.path(key), json.dumps(entry, allow_nan=True) + "\n")


def _checksum(payload: dict) -> str:
    return hashlib.sha256(canonical_json(payload).encode()).hexdigest()
