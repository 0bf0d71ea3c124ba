"""Read an audit output folder into one immutable object for the report writers.

The report never re-estimates anything: every number it prints comes from the
contract files an audit writes (see design.md, "Outputs"):

- ``variants.csv``  one row per variant: ``variant``, the varied settings, ``status``,
  ``reason``, ``instruments``, ``units``, ``observations``, ``hansen_p``, ``sargan_p``,
  ``ar1_p``, ``ar2_p`` (extra columns are kept and ignored where unknown);
- ``estimates.csv`` one row per variant x term: ``variant``, ``term``, ``estimate``,
  ``std_error``, ``p_value``;
- ``bounds.csv``    ``term``, ``ols``, ``fe`` (and their standard errors; optionally
  one row per variant or sample);
- ``verdict.json``  per focus term a verdict and the rules that fired;
- ``manifest.json`` package version, data hash, model file, settings, timings.

An optional ``truth.json`` in the same folder (the demo writes one) holds the true
parameter values of a simulated data-generating process; when present the report
adds a "known truth" section and marks the true values on the figures.

Anything that is not an audit folder fails with :class:`~robustgmm.errors.InputError`,
one line per missing file or column.
"""
from __future__ import annotations

import json
import math
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any, Mapping

import numpy as np
import pandas as pd

from ..errors import InputError

VARIANTS_REQUIRED = ("variant", "status", "instruments", "units", "observations",
                     "hansen_p", "sargan_p", "ar1_p", "ar2_p")
ESTIMATES_REQUIRED = ("variant", "term", "estimate", "std_error", "p_value")
BOUNDS_REQUIRED = ("term", "ols", "fe")

# Settings an audit can vary (DEVELOPERS.md, Spec / Vary).  Regressor-role columns
# are recognised by name (they contain "role"); the manifest may name more.
KNOWN_SETTINGS = ("equations", "transform", "steps", "form", "first_lag", "last_lag",
                  "time_effects", "errors", "sample")

# Columns of variants.csv that are results or bookkeeping, never settings.
RESULT_COLUMNS = frozenset(VARIANTS_REQUIRED) | {
    "reason", "is_base", "base", "in_bounds", "instruments_per_unit", "periods", "order",
    "parameters", "diff_hansen_level_p", "ar_term", "ar_coefficient", "ar_ols", "ar_fe",
    "acceptable", "flags",
    "hansen", "sargan", "ar1", "ar2", "hansen_df", "sargan_df", "std_error_kind",
    "warnings", "cached", "seconds", "time", "elapsed",
}

# Default thresholds, used only when neither verdict.json nor manifest.json states
# them; they mirror robustgmm.spec.Thresholds (sources in robustgmm.audit.verdicts).
DEFAULT_THRESHOLDS = {
    "hansen_reject": 0.05,
    "hansen_too_high": 0.25,
    "ar2_reject": 0.05,
    "difference_hansen_reject": 0.05,
    "instruments_per_unit": 1.0,
    "spread_in_se": 2.0,
    "significant_share": 0.9,
}

VERDICTS = ("robust", "fragile", "inconclusive")


@dataclass(frozen=True)
class Rule:
    """One rule of the verdict: what it checks, where it comes from, what it found."""

    id: str
    description: str = ""
    source: str = ""
    threshold: Any = None
    figures: Mapping[str, Any] = field(default_factory=dict)
    fired: bool = True
    effect: str = ""  # e.g. "fragile" / "warning" when the audit states it


@dataclass(frozen=True)
class TermVerdict:
    term: str
    verdict: str
    rules: tuple[Rule, ...] = ()
    details: Mapping[str, Any] = field(default_factory=dict)

    @property
    def fired(self) -> tuple[Rule, ...]:
        return tuple(r for r in self.rules if r.fired)


@dataclass(frozen=True)
class AuditFolder:
    """Everything the report needs, read from one audit output folder."""

    path: Path
    variants: pd.DataFrame
    estimates: pd.DataFrame
    bounds: pd.DataFrame
    verdict_raw: Mapping[str, Any]
    manifest: Mapping[str, Any]
    term_verdicts: tuple[TermVerdict, ...]
    model_flags: tuple[Rule, ...]
    rule_catalogue: tuple[Rule, ...]
    setting_columns: tuple[str, ...]
    base_variant: str
    alpha: float
    thresholds: Mapping[str, float]
    truth: Mapping[str, Any] | None = None
    #: True when variants.csv has an ``acceptable`` column (variants that estimated
    #: and pass their specification tests; the verdicts are judged on those). When
    #: it is absent every estimated variant counts as acceptable.
    has_acceptable: bool = False

    # -- convenient views ---------------------------------------------------
    @property
    def focus(self) -> tuple[str, ...]:
        return tuple(v.term for v in self.term_verdicts)

    @property
    def ok_variants(self) -> pd.DataFrame:
        return self.variants[self.variants["status"] == "ok"]

    @property
    def varied_settings(self) -> tuple[str, ...]:
        """Settings that take more than one value among the variants."""
        out = []
        for col in self.setting_columns:
            if self.variants[col].astype(str).nunique(dropna=False) > 1:
                out.append(col)
        return tuple(out)

    @property
    def outcome(self) -> str | None:
        """The outcome variable named in the manifest (any of its usual places)."""
        for place in (self.manifest, _get(self.manifest, "model", "spec", default={}),
                      _get(_get(self.manifest, "spec", default={}), "model", default={})):
            value = _get(place, "outcome")
            if isinstance(value, str):
                return value
        return None

    @property
    def ar_terms(self) -> tuple[str, ...]:
        """Autoregressive terms: those with a row in bounds.csv that are estimated."""
        terms = list(dict.fromkeys(self.bounds["term"].astype(str)))
        known = set(self.estimates["term"])
        return tuple(t for t in terms if t in known)

    @property
    def acceptable_variants(self) -> pd.DataFrame:
        return self.variants[self.variants["acceptable"]]

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
        if "variant" in rows.columns and (rows["variant"] == self.base_variant).any():
            rows = rows[rows["variant"] == self.base_variant]
        elif "sample" in rows.columns and "sample" in self.variants.columns:
            base_sample = self.variants.loc[self.variants["variant"] == self.base_variant,
                                            "sample"]
            if len(base_sample) and (rows["sample"] == base_sample.iloc[0]).any():
                rows = rows[rows["sample"] == base_sample.iloc[0]]
        row = rows.iloc[0]
        return float(row["fe"]), float(row["ols"])

    def truth_value(self, term: str) -> float | None:
        if not self.truth:
            return None
        params = self.truth.get("parameters", self.truth)
        value = params.get(term) if isinstance(params, Mapping) else None
        if isinstance(value, Mapping):
            value = value.get("value")
        try:
            return float(value) if value is not None else None
        except (TypeError, ValueError):
            return None

    def base_row(self) -> pd.Series:
        return self.variants[self.variants["variant"] == self.base_variant].iloc[0]


# ---------------------------------------------------------------------------
def _get(mapping, *keys, default=None):
    """First present key of ``keys`` in ``mapping`` (audits may name keys slightly
    differently across versions; the report reads any of them)."""
    if not isinstance(mapping, Mapping):
        return default
    for key in keys:
        if key in mapping and mapping[key] is not None:
            return mapping[key]
    return default


def _read_csv(path: Path, required, problems: list[str]) -> pd.DataFrame | None:
    if not path.is_file():
        problems.append(f"{path}: file missing (not an audit output folder? "
                        f"run `robustgmm audit MODEL.toml --out {path.parent}` first)")
        return None
    try:
        frame = pd.read_csv(path, keep_default_na=True)
    except Exception as exc:  # pandas raises several parser error types
        problems.append(f"{path}: cannot be read as CSV ({exc.__class__.__name__}: "
                        f"{str(exc).splitlines()[0] if str(exc) else ''})")
        return None
    for col in required:
        if col not in frame.columns:
            problems.append(f"{path}: column '{col}' missing")
    return frame


def _read_json(path: Path, problems: list[str], *, required=True):
    if not path.is_file():
        if required:
            problems.append(f"{path}: file missing (not an audit output folder? "
                            f"run `robustgmm audit MODEL.toml --out {path.parent}` first)")
        return None
    try:
        return json.loads(path.read_text(encoding="utf-8"))
    except (json.JSONDecodeError, UnicodeDecodeError) as exc:
        problems.append(f"{path}: not valid JSON ({exc})")
        return None


def _as_bool(value) -> bool:
    if isinstance(value, str):
        return value.strip().lower() in ("true", "1", "yes")
    try:
        return bool(value) and not (isinstance(value, float) and math.isnan(value))
    except (TypeError, ValueError):
        return False


def _rule_from(obj, fired_default=True) -> Rule:
    if isinstance(obj, str):
        return Rule(id=obj, fired=fired_default)
    if not isinstance(obj, Mapping):
        return Rule(id=str(obj), fired=fired_default)
    figures = _get(obj, "figures", "values", "evidence", default={})
    if not isinstance(figures, Mapping):
        figures = {"value": figures}
    fired = obj.get("fired", fired_default)
    # verdict.json states a threshold as a value plus the setting that holds it
    # ("threshold": 0.05, "threshold_name": "hansen_reject"); its catalogue as the
    # setting name plus "threshold_value". Either way the report shows name = value.
    threshold = _get(obj, "threshold", "thresholds")
    name = _get(obj, "threshold_name")
    if "threshold_value" in obj:
        name, threshold = (threshold if isinstance(threshold, str) else name), obj["threshold_value"]
    if isinstance(name, str) and name and threshold is not None and not isinstance(threshold, Mapping):
        threshold = {name: threshold}
    return Rule(
        id=str(_get(obj, "id", "rule", "name", default="rule")),
        description=str(_get(obj, "description", "text", "message", default="")),
        source=str(_get(obj, "source", "reference", default="")),
        threshold=threshold,
        figures=dict(figures),
        fired=_as_bool(fired),
        effect=str(_get(obj, "effect", "severity", "level", "kind", default="")),
    )


def _rules_from(obj, fired_default=True) -> tuple[Rule, ...]:
    if obj is None:
        return ()
    if isinstance(obj, Mapping):
        # {"rule_id": {...}} form
        out = []
        for key, value in obj.items():
            if isinstance(value, Mapping):
                out.append(_rule_from({"id": key, **value}, fired_default))
            else:
                out.append(_rule_from({"id": key, "figures": {"value": value}}, fired_default))
        return tuple(out)
    return tuple(_rule_from(item, fired_default) for item in obj)


def _parse_verdict(raw, path: Path, problems: list[str]):
    terms_obj = _get(raw, "terms", "focus", "verdicts")
    if terms_obj is None:
        problems.append(f"{path}: key 'terms' missing (expected one verdict per focus term)")
        return (), (), ()
    items = terms_obj.items() if isinstance(terms_obj, Mapping) else \
        [(t.get("term"), t) for t in terms_obj if isinstance(t, Mapping)]
    verdicts = []
    for term, obj in items:
        if not isinstance(obj, Mapping):
            problems.append(f"{path}: terms['{term}'] is not an object")
            continue
        verdict = str(_get(obj, "verdict", "status", default="")).lower()
        if verdict not in VERDICTS:
            problems.append(f"{path}: terms['{term}'].verdict is '{verdict}', "
                            f"expected one of {', '.join(VERDICTS)}")
        rules = _rules_from(_get(obj, "rules", "fired", "rules_fired"))
        details = {k: v for k, v in obj.items()
                   if k not in ("verdict", "status", "rules", "fired", "rules_fired", "term")}
        verdicts.append(TermVerdict(str(term), verdict, rules, details))
    model = _get(raw, "model", "model_flags", "flags", default=[])
    if isinstance(model, Mapping) and "flags" in model:
        model = model["flags"]
    flags = _rules_from(model)
    catalogue = _rules_from(_get(raw, "rules", "rule_catalogue", "catalogue"), fired_default=False)
    return tuple(verdicts), flags, catalogue


def _find_thresholds(verdict, manifest) -> dict:
    out = dict(DEFAULT_THRESHOLDS)
    for source in (_get(manifest, "thresholds"), _get(_get(manifest, "settings", default={}),
                                                       "thresholds"),
                   _get(verdict, "thresholds")):
        if isinstance(source, Mapping):
            for key, value in source.items():
                try:
                    out[key] = float(value)
                except (TypeError, ValueError):
                    pass
    return out


def _find_alpha(verdict, manifest) -> float:
    for value in (_get(verdict, "alpha"), _get(manifest, "alpha"),
                  _get(_get(manifest, "settings", default={}), "alpha"),
                  _get(_get(manifest, "audit", default={}), "alpha")):
        try:
            if value is not None:
                return float(value)
        except (TypeError, ValueError):
            pass
    return 0.05


def _setting_columns(variants: pd.DataFrame, manifest) -> tuple[str, ...]:
    named = set(KNOWN_SETTINGS)
    vary = _get(manifest, "vary", "varied")
    if vary is None:
        vary = _get(_get(manifest, "settings", default={}), "vary", "varied")
    if isinstance(vary, Mapping):
        named.update(str(k) for k in vary)
    elif isinstance(vary, (list, tuple)):
        named.update(str(k) for k in vary)
    out = []
    for col in variants.columns:
        if col in RESULT_COLUMNS:
            continue
        if col in named or "role" in col.lower():
            out.append(col)
    return tuple(out)


def _find_base(variants: pd.DataFrame, verdict, manifest) -> str:
    for col in ("is_base", "base"):
        if col in variants.columns:
            flags = variants[col].map(_as_bool)
            if flags.any():
                return str(variants.loc[flags, "variant"].iloc[0])
    named = _get(manifest, "base_variant", "base") or _get(verdict, "base_variant", "base")
    if isinstance(named, str) and (variants["variant"] == named).any():
        return named
    return str(variants["variant"].iloc[0])


def read_audit_folder(out_dir) -> AuditFolder:
    """Read and check the contract files in ``out_dir``.

    Raises :class:`InputError` listing every missing file, missing column or
    malformed document found (all of them, not only the first)."""
    path = Path(out_dir)
    if not path.is_dir():
        raise InputError([f"{path}: not a folder (expected the output folder of "
                          f"`robustgmm audit MODEL.toml --out {path}`)"])
    problems: list[str] = []
    variants = _read_csv(path / "variants.csv", VARIANTS_REQUIRED, problems)
    estimates = _read_csv(path / "estimates.csv", ESTIMATES_REQUIRED, problems)
    bounds = _read_csv(path / "bounds.csv", BOUNDS_REQUIRED, problems)
    verdict = _read_json(path / "verdict.json", problems)
    manifest = _read_json(path / "manifest.json", problems)
    truth = _read_json(path / "truth.json", problems, required=False)
    if verdict is not None and not isinstance(verdict, Mapping):
        problems.append(f"{path / 'verdict.json'}: expected a JSON object")
        verdict = None
    if manifest is not None and not isinstance(manifest, Mapping):
        problems.append(f"{path / 'manifest.json'}: expected a JSON object")
        manifest = None
    term_verdicts, flags, catalogue = ((), (), ())
    if verdict is not None:
        term_verdicts, flags, catalogue = _parse_verdict(verdict, path / "verdict.json", problems)
    if variants is not None and "variant" in variants.columns:
        if variants.empty:
            problems.append(f"{path / 'variants.csv'}: no variants (empty table)")
        elif variants["variant"].duplicated().any():
            dup = variants.loc[variants["variant"].duplicated(), "variant"].iloc[0]
            problems.append(f"{path / 'variants.csv'}: variant id '{dup}' appears twice")
    if problems:
        raise InputError(problems)

    variants = variants.copy()
    variants["variant"] = variants["variant"].astype(str)
    variants["status"] = variants["status"].astype(str).str.strip().str.lower()
    if "reason" not in variants.columns:
        variants["reason"] = ""
    variants["reason"] = variants["reason"].astype(object).where(
        variants["reason"].notna(), "").astype(str)
    has_acceptable = "acceptable" in variants.columns
    ok = (variants["status"] == "ok").to_numpy()
    if has_acceptable:
        variants["acceptable"] = variants["acceptable"].map(_as_bool).to_numpy(bool) & ok
    else:
        variants["acceptable"] = ok
    estimates = estimates.copy()
    estimates["variant"] = estimates["variant"].astype(str)
    estimates["term"] = estimates["term"].astype(str)
    bounds = bounds.copy()
    bounds["term"] = bounds["term"].astype(str)
    if "variant" in bounds.columns:
        bounds["variant"] = bounds["variant"].astype(str)

    for col in ("instruments", "units", "observations", "hansen_p", "sargan_p",
                "ar1_p", "ar2_p"):
        variants[col] = pd.to_numeric(variants[col], errors="coerce")
    for col in ("estimate", "std_error", "p_value"):
        estimates[col] = pd.to_numeric(estimates[col], errors="coerce")

    return AuditFolder(
        path=path,
        variants=variants,
        estimates=estimates,
        bounds=bounds,
        verdict_raw=verdict,
        manifest=manifest,
        term_verdicts=term_verdicts,
        model_flags=flags,
        rule_catalogue=catalogue,
        setting_columns=_setting_columns(variants, manifest),
        base_variant=_find_base(variants, verdict, manifest),
        alpha=_find_alpha(verdict, manifest),
        thresholds=_find_thresholds(verdict, manifest),
        truth=truth if isinstance(truth, Mapping) else None,
        has_acceptable=has_acceptable,
    )
