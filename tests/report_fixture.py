"""A synthetic audit output folder written the way an audit writes it.

The report tests run against folders written here, so that the report can be tested
without estimating anything (and with any number of variants). The estimates and
test p-values are invented; the verdict columns of variants.csv and verdict.json
come from the real rules (robustgmm.audit.verdicts.evaluate), so the report is
tested on the documents the verdict module writes.
"""
from __future__ import annotations

import itertools
import json
from math import erfc, sqrt
from pathlib import Path

import numpy as np
import pandas as pd

from robustgmm.audit import verdicts
from robustgmm.spec import SampleFilter, Spec, Vary

AR = "y[t-1]"
ROBUST = "x[t]"
FRAGILE = "w[t]"


def _grid(n_variants: int):
    """First ``n_variants`` settings of a product grid large enough for 300+."""
    values = {  # the last key varies fastest, so small grids still vary equations
        "last_lag": ["all", 2, 3, 4, 5, 6, 7, 8, 9, 10],
        "sample": ["full sample", "from 2013"],
        "steps": [2, 1],
        "transform": ["fd", "fod"],
        "form": ["per-period", "collapsed"],
        "equations": ["system", "difference"],
    }
    combos = list(itertools.product(*values.values()))
    assert n_variants <= len(combos)
    return [dict(zip(values, c)) for c in combos[:n_variants]]


def _spec(fragile_term: str) -> Spec:
    """The model the fixture pretends to have audited (its focus terms and grid)."""
    return Spec(unit="unit", period="period", outcome="y", focus=(AR, ROBUST, fragile_term),
                vary=Vary(last_lag=(None, 2, 3, 4, 5, 6, 7, 8, 9, 10),
                          samples=(SampleFilter("from 2013", period_from=2013),),
                          steps=(2, 1), transform=("fd", "fod"),
                          form=("per-period", "collapsed"),
                          equations=("system", "difference")))


def write_fake_audit(path, n_variants: int = 24, *, fragile_term: str = FRAGILE,
                     failed: int = 1, truth: bool = False, seed: int = 1,
                     role_column: str | None = None, acceptable: bool = True) -> Path:
    """Write variants.csv, estimates.csv, bounds.csv, verdict.json, manifest.json.

    ``fragile_term`` and ``role_column`` (the name of an extra varied setting
    column, e.g. a regressor-role column) may contain markup (to test escaping). The
    first variant is the
    base model; when ``failed`` > 0 and there are enough variants, the last ``failed``
    variants are marked failed with a reason and no estimates.
    """
    path = Path(path)
    path.mkdir(parents=True, exist_ok=True)
    rng = np.random.default_rng(seed)
    rows, est_rows = [], []
    grid = _grid(n_variants)
    n_failed = failed if n_variants > 2 else 0
    for i, settings in enumerate(grid):
        vid = f"v{i:03d}" if i else "base"
        ok = i < n_variants - n_failed
        collapsed = settings["form"] == "collapsed"
        depth = 9 if settings["last_lag"] == "all" else int(settings["last_lag"])
        instruments = (depth + 3) if collapsed else (8 * depth + 10)
        if settings["equations"] == "system":
            instruments += 1 if collapsed else 8
        hansen_p = float(np.clip(0.02 + instruments / 120 + rng.normal(0, 0.05), 0.001, 1.0))
        row = {
            "variant": vid, **settings,
            "status": "ok" if ok else "failed",
            "reason": "" if ok else "weight matrix is singular",
            "instruments": instruments, "units": 300, "observations": 2400,
            "hansen_p": hansen_p if ok else np.nan,
            "sargan_p": float(np.clip(hansen_p - 0.01, 0, 1)) if ok else np.nan,
            "ar1_p": 0.0001 if ok else np.nan,
            "ar2_p": (0.5 if i == 0 else float(rng.uniform(0.01, 0.9))) if ok else np.nan,
            "diff_hansen_level_p": (float(rng.uniform(0.1, 0.9)) if ok and
                                    settings["equations"] == "system" else np.nan),
            "is_base": i == 0,
        }
        if role_column is not None:
            row[role_column] = "predetermined" if i % 3 == 1 else "endogenous"
        rho = 0.55 + (0.1 if settings["equations"] == "system" else -0.12) + rng.normal(0, 0.02)
        row["in_bounds"] = bool(0.35 < rho < 0.75) if ok else np.nan
        row["ar_coefficient"] = rho if ok else np.nan
        rows.append(row)
        if not ok:
            continue
        frag = (0.08 if settings["equations"] == "system" else -0.02) + rng.normal(0, 0.01)
        for term, est, se in ((AR, rho, 0.05), (ROBUST, 0.8 + rng.normal(0, 0.03), 0.1),
                              (fragile_term, frag, 0.04), ("const", 0.1, 0.05)):
            z = est / se
            est_rows.append({"variant": vid, "term": term, "estimate": est,
                             "std_error": se, "p_value": erfc(abs(z) / sqrt(2))})
    variants = pd.DataFrame(rows)
    estimates = pd.DataFrame(est_rows, columns=["variant", "term", "estimate", "std_error",
                                                "p_value"])
    bounds = pd.DataFrame([{"variant": "base", "is_base": True, "term": AR, "ols": 0.75,
                            "ols_std_error": 0.02, "fe": 0.35, "fe_std_error": 0.03}])
    spec = _spec(fragile_term)
    evaluation = verdicts.evaluate(spec, variants, estimates, bounds)
    if acceptable:  # as an audit writes them
        for col in ("evidence", "acceptable", "duplicate_of", "flags"):
            variants[col] = evaluation.columns[col].to_numpy()
    variants.to_csv(path / "variants.csv", index=False)
    estimates.to_csv(path / "estimates.csv", index=False)
    bounds.to_csv(path / "bounds.csv", index=False)
    (path / "verdict.json").write_text(json.dumps(evaluation.verdict.to_dict(), indent=2))
    manifest = {
        "package": "robustgmm", "version": "0.1.0", "data_hash": "abc123" * 10,
        "model_file": "model <test>.toml", "outcome": "y",
        "settings": {"equations": "system", "transform": "fd"},
        "timings": {"total_seconds": 1.5},
    }
    (path / "manifest.json").write_text(json.dumps(manifest, indent=2))
    if truth:
        (path / "truth.json").write_text(json.dumps(
            {"parameters": {AR: 0.6, ROBUST: 0.8, fragile_term: 0.05}}))
    return path
