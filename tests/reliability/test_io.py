"""Atomic writers: content, permissions, and nothing left behind on failure."""
import os
import stat

import pytest

from robustgmm.atomic import atomic_write_text


def test_atomic_write_has_ordinary_permissions(tmp_path):
    path = atomic_write_text(tmp_path / "a.txt", "hello")
    mask = os.umask(0)
    os.umask(mask)
    assert stat.S_IMODE(path.stat().st_mode) == 0o666 & ~mask
    assert path.read_text() == "hello"


def test_failed_write_leaves_old_file_and_no_temp(tmp_path, monkeypatch):
    target = tmp_path / "b.txt"
    atomic_write_text(target, "old")

    def boom(*a, **k):
        raise OSError("disk full")

    monkeypatch.setattr(os, "replace", boom)
    with pytest.raises(OSError):
        atomic_write_text(target, "new")
    assert target.read_text() == "old"
    assert [p.name for p in tmp_path.iterdir()] == ["b.txt"]
