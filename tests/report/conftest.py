"""Audit folders made by the real writer, built once per session (tests/report_fixture.py)."""
from __future__ import annotations

import pytest

from report_fixture import build_folder, copy_folder


@pytest.fixture(scope="session")
def audit_folder(tmp_path_factory):
    """``audit_folder(name)``: the folder of the real audit ``name`` (read-only: use
    ``writable_folder`` to change a file)."""
    root = tmp_path_factory.mktemp("real_audits")
    built = {}

    def get(name: str):
        if name not in built:
            built[name] = build_folder(name, root)
        return built[name]
    return get


@pytest.fixture
def writable_folder(audit_folder, tmp_path):
    """``writable_folder(name)``: a copy of the folder ``name`` in this test's tmp_path."""
    return lambda name: copy_folder(audit_folder(name), tmp_path / name)
