"""docs/formats.md describes every column and key of robustgmm/contract.py."""
from __future__ import annotations

from pathlib import Path

from robustgmm import contract

DOC = (Path(__file__).resolve().parents[1] / "docs" / "formats.md").read_text()


def test_every_column_is_documented_with_its_kind():
    for table in contract.TABLES + contract.SIMULATION_TABLES + contract.DROPPING_TABLES:
        section = DOC.split(f"### {table.file}", 1)[1].split("\n### ", 1)[0]
        for col in table.columns:
            assert f"| `{col.name}` | {col.kind} | {col.doc} |" in section, (table.file, col.name)


def test_every_json_key_is_documented():
    for key in (contract.VERDICT_KEYS + contract.TERM_KEYS + contract.MANIFEST_KEYS
                + contract.FIT_KEYS + contract.FIT_TEST_KEYS + contract.FIT_COUNT_KEYS
                + contract.CALIBRATION_KEYS):
        assert f"`{key}`" in DOC, key
    assert f"now {contract.FORMAT_VERSION})" in DOC
    assert "| `vcov` |" in DOC and "| `diagnostics` |" in DOC


def test_a_long_table_is_read_by_whole_columns(tmp_path, recwarn):
    # issue 12 item 12: a grid of 103,680 variants read `steps` back half integers
    # and half text, with a pandas DtypeWarning on stderr (pandas parses a csv in
    # chunks of 2**18 rows unless told to type each column as a whole)
    import pandas as pd
    names = contract.VARIANTS.names(["steps"])
    rows = 2 ** 18 + 5
    line = {n: "" for n in names}
    line.update(variant="a", order="1", is_base="False", status="failed", steps="2")
    text = ",".join(names) + "\n" + (",".join(line[n] for n in names) + "\n") * rows
    path = tmp_path / "variants.csv"
    path.write_text(text + text.splitlines()[1].replace(",2,", ",iterated,") + "\n")
    problems: list = []
    frame = contract.read_table(contract.VARIANTS, path, ["steps"], problems)
    assert problems == []
    assert not [w for w in recwarn if issubclass(w.category, pd.errors.DtypeWarning)]
    assert {type(v) for v in frame["steps"]} == {str}
    assert frame["steps"].iloc[-1] == "iterated" and frame["steps"].iloc[0] == "2"
