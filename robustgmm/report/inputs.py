"""Read an audit output folder into one immutable object for the report writers.

The report never re-estimates anything: every number it prints comes from the files
an audit writes, in the format of :mod:`robustgmm.contract` (prose:
``docs/formats.md``). The reader is strict: a missing file, a missing, renamed or
unknown column, a cell of the wrong kind, a missing key or a folder of another
``format_version`` is one line of :class:`~robustgmm.errors.InputError` naming it,
and every such problem is listed at once. No key is looked up under another name.

An optional ``truth.json`` in the same folder (the demo writes one) holds the true
parameter values of a simulated data-generating process (``{"parameters": {term:
value}}``); when present the report adds a "known truth" section and marks the true
values on the figures.
"""
from __future__ import annotations

import json
import math
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any, Mapping

import numpy as np
import pandas as pd

from .. import contract
from ..audit.verdicts import AuditVerdict, Firing, TermVerdict
from ..audit.verdicts import Rule as VerdictRule
from ..errors import InputError

VERDICTS = ("robust", "fragile", "inconclusive")


@dataclass(frozen=True)
class AuditFolder:
    """Everything the report needs, read from one audit output folder."""

    path: Path
    variants: pd.DataFrame
    estimates: pd.DataFrame
    bounds: pd.DataFrame
    verdict_raw: Mapping[str, Any]
    manifest: Mapping[str, Any]
    #: verdict.json as the typed record the verdict module wrote
    verdict: AuditVerdict
    setting_columns: tuple[str, ...]
    base_variant: str
    alpha: float
    thresholds: Mapping[str, float]
    truth: Mapping[str, Any] | None = None
    #: the dropping-units tables by file name (influence.csv, influence_units.csv,
    #: influence_path.csv, periods.csv), when manifest.json lists them; else None
    dropping: Mapping[str, pd.DataFrame] | None = None
    #: Kept for the report writers: variants.csv always has the ``acceptable``
    #: column (variants that estimated and pass their specification tests; the
    #: verdicts are judged on those).
    has_acceptable: bool = True

    # -- convenient views ---------------------------------------------------
    @property
    def term_verdicts(self) -> tuple[TermVerdict, ...]:
        return self.verdict.terms

    @property
    def model_flags(self) -> tuple[Firing, ...]:
        return self.verdict.model

    @property
    def rule_catalogue(self) -> tuple[VerdictRule, ...]:
        return self.verdict.rules

    @property
    def focus(self) -> tuple[str, ...]:
        return tuple(v.term for v in self.term_verdicts)

    @property
    def ok_variants(self) -> pd.DataFrame:
        return self.variants[self.variants["status"] == "ok"]

    @property
    def outcome(self) -> str | None:
        """The outcome variable named in the manifest."""
        value = self.manifest["outcome"]
        return value if isinstance(value, str) else None

    @property
    def ar_terms(self) -> tuple[str, ...]:
        """Autoregressive terms: those with a row in bounds.csv that are estimated."""
        terms = list(dict.fromkeys(self.bounds["term"].astype(str)))
        known = set(self.estimates["term"])
        return tuple(t for t in terms if t in known)

    def term_estimates(self, term: str, *, ok_only: bool = True,
                       acceptable_only: bool = False) -> pd.DataFrame:
        """One row per variant for ``term``, joined with the variant's settings and
        diagnostics; columns from variants.csv keep their names."""
        est = self.estimates[self.estimates["term"] == term]
        frame = self.variants.merge(est.drop(columns=["term"]), on="variant", how="inner",
                                    suffixes=("", "_est"))
        if ok_only:
            frame = frame[frame["status"] == "ok"]
        if acceptable_only:
            frame = frame[frame["acceptable"]]
        frame = frame[np.isfinite(frame["estimate"].to_numpy(dtype=float))]
        return frame.reset_index(drop=True)

    def bounds_for(self, term: str) -> pd.DataFrame:
        return self.bounds[self.bounds["term"].astype(str) == term]

    def band(self, term: str) -> tuple[float, float] | None:
        """The (within, pooled OLS) pair for ``term`` on the base sample, or None."""
        rows = self.bounds_for(term)
        if rows.empty:
            return None
        if (rows["variant"] == self.base_variant).any():
            rows = rows[rows["variant"] == self.base_variant]
        row = rows.iloc[0]
        return float(row["fe"]), float(row["ols"])

    def truth_value(self, term: str) -> float | None:
        if not self.truth:
            return None
        params = self.truth.get("parameters")
        value = params.get(term) if isinstance(params, Mapping) else None
        try:
            return float(value) if value is not None else None
        except (TypeError, ValueError):
            return None

    def base_row(self) -> pd.Series:
        return self.variants[self.variants["variant"] == self.base_variant].iloc[0]


# ---------------------------------------------------------------------------
def _read_json(path: Path, problems: list[str], *, required=True):
    if not path.is_file():
        if required:
            problems.append(f"{path}: file missing (not an audit output folder? "
                            f"run `robustgmm audit MODEL.toml --out {path.parent}` first)")
        return None
    try:
        value = json.loads(path.read_text(encoding="utf-8"))
    except (json.JSONDecodeError, UnicodeDecodeError) as exc:
        problems.append(f"{path}: not valid JSON ({exc})")
        return None
    if not isinstance(value, Mapping):
        problems.append(f"{path}: expected a JSON object")
        return None
    return value


def _missing_keys(obj: Mapping, keys, where: str, problems: list[str]) -> bool:
    """Append one line per key of ``keys`` missing from ``obj``; True when all present."""
    missing = [k for k in keys if k not in obj]
    problems.extend(f"{where}: key '{k}' missing" for k in missing)
    return not missing


def _as_bool(value) -> bool:
    try:
        return bool(value) and not (isinstance(value, float) and math.isnan(value))
    except (TypeError, ValueError):
        return False


def _parse_verdict(raw: Mapping, path: Path, problems: list[str]) -> AuditVerdict | None:
    """verdict.json as the verdict module's typed record (:class:`AuditVerdict`);
    every missing key or malformed entry is one line."""
    if not _missing_keys(raw, contract.VERDICT_KEYS, str(path), problems):
        return None
    if not isinstance(raw["terms"], Mapping):
        problems.append(f"{path}: 'terms' must map each focus term to its verdict")
        return None
    ok = True
    for term, obj in raw["terms"].items():
        where = f"{path}: terms['{term}']"
        if not isinstance(obj, Mapping):
            problems.append(f"{where} is not an object")
            ok = False
            continue
        if not _missing_keys(obj, contract.TERM_KEYS, where, problems):
            ok = False
            continue
        if obj["verdict"] not in VERDICTS:
            problems.append(f"{where}.verdict is {obj['verdict']!r}, expected one of "
                            f"{', '.join(VERDICTS)}")
            ok = False
    for key in ("model", "rules"):
        if not isinstance(raw[key], list) or not all(
                isinstance(r, Mapping) and "id" in r and "effect" in r for r in raw[key]):
            problems.append(f"{path}: '{key}' must be a list of rule objects with an 'id' "
                            f"and an 'effect'")
            ok = False
    if not ok:
        return None
    try:
        return AuditVerdict.from_dict(raw)
    except (KeyError, TypeError, ValueError) as exc:
        problems.append(f"{path}: malformed ({' '.join(str(exc).split())})")
        return None


def _thresholds(verdict: Mapping) -> dict:
    out = {}
    for key, value in verdict["thresholds"].items():
        try:
            out[key] = float(value)
        except (TypeError, ValueError):
            pass
    return out


def read_audit_folder(out_dir) -> AuditFolder:
    """Read and check the files of the audit folder ``out_dir``.

    Raises :class:`InputError` listing every missing file, missing or unknown
    column, missing key or malformed document found (all of them, not only the
    first)."""
    path = Path(out_dir)
    if not path.is_dir():
        raise InputError([f"{path}: not a folder (expected the output folder of "
                          f"`robustgmm audit MODEL.toml --out {path}`)"])
    problems: list[str] = []
    manifest = _read_json(path / "manifest.json", problems)
    settings: list[str] = []
    if manifest is not None:
        where = str(path / "manifest.json")
        version = manifest.get("format_version")
        if version != contract.FORMAT_VERSION:
            problems.append(f"{where}: format_version is {json.dumps(version)}, this robustgmm "
                            f"reads {contract.FORMAT_VERSION}; rerun the audit to rebuild the folder")
        elif _missing_keys(manifest, contract.MANIFEST_KEYS, where, problems):
            if isinstance(manifest["vary"], list) and all(isinstance(c, str) for c in manifest["vary"]):
                settings = list(manifest["vary"])
            else:
                problems.append(f"{where}: 'vary' must be the list of varied setting columns")
    tables = {t.file: contract.read_table(t, path / t.file, settings if t is contract.VARIANTS
                                          else (), problems) for t in contract.TABLES}
    variants, estimates, bounds = (tables[t.file] for t in contract.TABLES)
    dropping = None
    listed = manifest.get("files") if isinstance(manifest, Mapping) else None
    if isinstance(listed, list) and contract.INFLUENCE.file in listed:
        # listed files are read as strictly as the others: a missing one is a problem
        dropping = {t.file: contract.read_table(t, path / t.file, (), problems)
                    for t in contract.DROPPING_TABLES}
    verdict = _read_json(path / "verdict.json", problems)
    truth = _read_json(path / contract.TRUTH_FILE, problems, required=False)
    typed = None
    if verdict is not None:
        typed = _parse_verdict(verdict, path / "verdict.json", problems)
    if variants is not None:
        if variants.empty:
            problems.append(f"{path / 'variants.csv'}: no variants (empty table)")
        elif variants["variant"].duplicated().any():
            dup = variants.loc[variants["variant"].duplicated(), "variant"].iloc[0]
            problems.append(f"{path / 'variants.csv'}: variant id '{dup}' appears twice")
        elif variants["is_base"].map(_as_bool).sum() != 1:
            problems.append(f"{path / 'variants.csv'}: column 'is_base' must be True on "
                            "exactly one row")
    if problems:
        raise InputError(problems)

    variants = variants.copy()
    variants["reason"] = variants["reason"].where(variants["reason"].notna(), "").astype(str)
    ok = (variants["status"] == "ok").to_numpy()
    variants["acceptable"] = variants["acceptable"].map(_as_bool).to_numpy(bool) & ok
    base = str(variants.loc[variants["is_base"].map(_as_bool), "variant"].iloc[0])

    return AuditFolder(
        path=path,
        variants=variants,
        estimates=estimates,
        bounds=bounds,
        verdict_raw=verdict,
        manifest=manifest,
        verdict=typed,
        setting_columns=tuple(settings),
        base_variant=base,
        alpha=float(verdict["alpha"]),
        thresholds=_thresholds(verdict),
        truth=truth,
        dropping=dropping,
    )
