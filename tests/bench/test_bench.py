"""`robustgmm bench --quick` runs every workload and writes its report.

Tiny sizes (ROBUSTGMM_BENCH_SIZES=tiny) keep this to seconds. Nothing here looks at
a timing: speed is what the bench reports, never what a test asserts.
"""
from __future__ import annotations

import re

from robustgmm import bench
from robustgmm.cli import main


def test_bench_quick_writes_every_workload(tmp_path, monkeypatch, capsys):
    monkeypatch.setenv(bench.SIZES_ENV, "tiny")
    out = tmp_path / "bench"
    assert main(["bench", "--quick", "--out", str(out)]) == 0
    text = (out / "bench.md").read_text(encoding="utf-8")
    printed = capsys.readouterr().out
    for title in ("1. Marginal cost", "2. Scale", "3. Audit throughput", "4. Against linearmodels",
                  "5. Calibrated Monte Carlo"):
        assert f"## {title}" in text
        assert title in printed
    assert "failed:" not in text, text
    # every ratio of the four targets was measured (a number in the table), none skipped
    rows = [line for line in text.splitlines() if line.startswith("| ") and "---" not in line][1:]
    names = [r.split("|")[2].strip() for r in rows]
    for expected in ("extra fit time / extra dense Z'Z time", "peak memory at N = 160 / 3 GB",
                     "core shared work / one by one", "audit jobs = 2 / jobs = 1",
                     "robustgmm / linearmodels", "one replication / audit estimation time",
                     "replications jobs = 2 / jobs = 1", "one greedy step / one fit",
                     "48-variant audit with dropping units / without"):
        assert expected in names, names
    for r in rows:  # a number (nan only where tiny timings drown in noise)
        value = r.split("|")[3].strip()
        assert re.fullmatch(r"\d+\.\d{3}|nan", value), r
        assert value != "nan" or "Z'Z" in r, r
    assert "## Machine" in text and "numpy" in text and "tiny sizes" in text
    assert "BLAS thread" in text


def test_the_audit_workload_estimates_the_one_by_one_variants():
    # the ratio "audit / one-by-one fits" compares the same work only if the audit's
    # grid expands to exactly the specs the one-by-one loop fits
    from robustgmm.audit import grid
    base = bench._spec()
    one_by_one = {grid.settings_hash(s) for s in bench.audit_specs(base)}
    planned = grid.expand(bench._audit_base_spec(base))
    assert len(one_by_one) == len(bench.audit_specs(base)) == 64
    assert {grid.settings_hash(v.spec) for v in planned} == one_by_one


def test_a_partial_run_writes_only_the_chosen_workloads(tmp_path, monkeypatch, capsys):
    monkeypatch.setenv(bench.SIZES_ENV, "tiny")
    out = tmp_path / "bench"
    assert main(["bench", "--workloads", "4", "--out", str(out)]) == 0
    text = (out / "bench.md").read_text(encoding="utf-8")
    assert "## 4. Against linearmodels" in text and "Partial run" in text
    assert "## 1. Marginal cost" not in text and "## 8." not in text


def test_a_bad_workload_list_is_a_one_line_error(tmp_path, capsys):
    assert main(["bench", "--workloads", "4,9", "--out", str(tmp_path)]) == 2
    err = capsys.readouterr().err.strip()
    assert "'9' is not a workload number" in err and len(err.splitlines()) == 1
    assert main(["bench", "--workloads", "4"]) == 2
    assert "--out" in capsys.readouterr().err
