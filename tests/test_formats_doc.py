"""docs/formats.md describes every column and key of robustgmm/contract.py."""
from __future__ import annotations

from pathlib import Path

from robustgmm import contract

DOC = (Path(__file__).resolve().parents[1] / "docs" / "formats.md").read_text()


def test_every_column_is_documented_with_its_kind():
    for table in contract.TABLES:
        section = DOC.split(f"### {table.file}", 1)[1].split("\n### ", 1)[0]
        for col in table.columns:
            assert f"| `{col.name}` | {col.kind} | {col.doc} |" in section, (table.file, col.name)


def test_every_json_key_is_documented():
    for key in (contract.VERDICT_KEYS + contract.TERM_KEYS + contract.MANIFEST_KEYS
                + contract.FIT_KEYS + contract.FIT_TEST_KEYS + contract.FIT_COUNT_KEYS):
        assert f"`{key}`" in DOC, key
    assert f"now {contract.FORMAT_VERSION})" in DOC
    assert "| `vcov` |" in DOC and "| `diagnostics` |" in DOC
