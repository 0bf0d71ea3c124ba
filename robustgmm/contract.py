"""The formats robustgmm writes and reads: the audit folder and the fit JSON.

One table per file: its columns in order, each with its kind and one line of
meaning. :func:`robustgmm.audit.write_audit` writes the columns in this order and
:func:`robustgmm.report.read_audit_folder` accepts exactly these columns (plus the
varied settings the manifest names), so the writer and the reader cannot drift apart.
The prose version is ``docs/formats.md``.

**Adding a column** is one line in the table of its file below (and the writer
filling it); bump :data:`FORMAT_VERSION` when a column is renamed or removed, or
changes meaning, so that an old folder is refused with a clear message instead of
being misread.

Kinds (how the reader parses a CSV column; empty cells are missing values):

- ``text``: a string (ids stay strings: ``00123456`` keeps its zeros);
- ``int``: a whole number, missing allowed;
- ``float``: a number (``%.17g`` in the file, so a reread equals what was computed);
- ``bool``: ``True`` / ``False``, missing allowed;
- ``setting``: a varied setting, as the model file writes it (``system``, ``2``,
  ``all``, ``True``, a role or a sample name).
"""
from __future__ import annotations

from dataclasses import dataclass
from pathlib import Path
from typing import Iterable, Sequence

import pandas as pd

#: Version of the audit-folder format, written into manifest.json.
FORMAT_VERSION = 2

KINDS = ("text", "int", "float", "bool", "setting")


@dataclass(frozen=True)
class Column:
    name: str
    kind: str
    doc: str

    def __post_init__(self):
        assert self.kind in KINDS, self.kind


@dataclass(frozen=True)
class Table:
    """A CSV file of the audit folder. ``settings_after`` names the column after
    which the varied settings (one column each, named as in manifest.json ``vary``)
    are inserted; None when the file has none."""

    file: str
    columns: tuple[Column, ...]
    settings_after: str | None = None

    def names(self, settings: Sequence[str] = ()) -> list[str]:
        """Column names in file order, with the varied ``settings`` in place."""
        out = []
        for col in self.columns:
            out.append(col.name)
            if col.name == self.settings_after:
                out.extend(settings)
        return out

    def kinds(self, settings: Sequence[str] = ()) -> dict[str, str]:
        out = {c.name: c.kind for c in self.columns}
        out.update({s: "setting" for s in settings})
        return out

    def problems(self, columns: Iterable[str], settings: Sequence[str], where) -> list[str]:
        """One line per missing or unexpected column (a renamed column shows as both)."""
        present = list(columns)
        expected = self.names(settings)
        out = [f"{where}: column '{c}' missing" for c in expected if c not in present]
        out += [f"{where}: column '{c}' is not part of the format "
                f"(format_version {FORMAT_VERSION}; see docs/formats.md)"
                for c in present if c not in expected]
        return out


VARIANTS = Table("variants.csv", (
    Column("variant", "text", "stable id: the first 8 hex digits of the sha256 of the canonical settings"),
    Column("order", "int", "position in the plan, 1 = the base model"),
    Column("is_base", "bool", "True for the base model (exactly one row)"),
    Column("status", "text", "ok, failed or skipped"),
    Column("reason", "text", "why a variant failed or was skipped (empty when ok)"),
    Column("instruments", "int", "instrument columns used"),
    Column("parameters", "int", "estimated coefficients"),
    Column("units", "int", "units in the estimation sample"),
    Column("observations", "int", "level observations in the estimation sample"),
    Column("instruments_per_unit", "float", "instruments / units"),
    Column("hansen_p", "float", "Hansen J p-value"),
    Column("hansen_df", "int", "Hansen J degrees of freedom"),
    Column("sargan_p", "float",
           "Sargan p-value (not robust to heteroskedasticity; difference GMM only)"),
    Column("sargan_df", "int", "Sargan degrees of freedom"),
    Column("ar1_p", "float", "Arellano-Bond AR(1) p-value, differenced residuals"),
    Column("ar2_p", "float", "Arellano-Bond AR(2) p-value, differenced residuals"),
    Column("diff_hansen_level_p", "float",
           "difference-in-Hansen p-value of the level-equation instruments (system GMM)"),
    Column("diff_hansen_level_df", "int",
           "its degrees of freedom (the level-equation instruments the test sets aside)"),
    Column("underid_p", "float",
           "p-value of the Kleibergen-Paap rank test (LM form, unit-clustered) of underidentification of the whole instrument set; empty where not valid (reason in unavailable_tests)"),
    Column("rk_f", "float",
           "the Kleibergen-Paap rank Wald statistic divided by its degrees of freedom (a strength measure; no critical values for clustered GMM)"),
    Column("underid_p_transformed", "float",
           "the same rank test on the transformed-equation instruments and the regressor terms they move"),
    Column("underid_p_level", "float",
           "the same rank test on the level-equation instruments (system GMM)"),
    Column("weak_f_min", "float",
           "smallest Sanderson-Windmeijer conditional F over the lagged outcome and the endogenous or predetermined regressor terms"),
    Column("weak_f_term", "text",
           "the term with that smallest conditional F"),
    Column("std_error_kind", "text",
           "cluster-robust, windmeijer, windmeijer-iterated or conventional"),
    Column("ar_term", "text", "the AR term the band check uses (one lag, or the sum of the lags)"),
    Column("ar_coefficient", "float", "its GMM estimate"),
    Column("ar_ols", "float", "pooled OLS estimate on the variant's sample"),
    Column("ar_fe", "float", "within (fixed-effects) estimate on the variant's sample"),
    Column("in_bounds", "bool", "the GMM estimate lies between the within and OLS estimates"),
    Column("unavailable_tests", "text",
           "tests not reported because they would not have their stated distribution, "
           "each 'name: reason', separated by ' | ' (e.g. Sargan in system GMM)"),
    Column("evidence", "text",
           "acceptable (estimated, every required test computed and passed), untestable "
           "(no test rejects but one cannot be computed, e.g. an exactly identified Hansen "
           "test), rejected (a test rejects, or the rank test does not reject "
           "underidentification), failed or skipped"),
    Column("acceptable", "bool", "`evidence` is acceptable (kept for compatibility)"),
    Column("duplicate_of", "text",
           "the id of the earlier variant with the same estimates to 1e-10 (empty when "
           "none); a duplicate casts no vote. Also set on variants the plan skips as the "
           "same estimation (a deeper `last_lag` that gives the same instrument set)"),
    Column("flags", "text", "variant rules that fired, separated by ';'"),
    Column("warnings", "text", "estimation warnings, separated by ' | '"),
), settings_after="is_base")

ESTIMATES = Table("estimates.csv", (
    Column("variant", "text", "variant id"),
    Column("term", "text", "term label: NAME[t], NAME[t-1], const, period[1984], and the "
           "long-run effect NAME[long-run] of each regressor (after the coefficients)"),
    Column("estimate", "float", "coefficient"),
    Column("std_error", "float", "standard error (the variant's std_error_kind)"),
    Column("z", "float", "estimate / std_error"),
    Column("p_value", "float", "two-sided normal p-value"),
))

BOUNDS = Table("bounds.csv", (
    Column("variant", "text", "variant id (the base model's rows first)"),
    Column("is_base", "bool", "True on the base model's rows"),
    Column("term", "text", "an AR term, or the sum of the AR terms"),
    Column("ols", "float", "pooled OLS estimate"),
    Column("ols_std_error", "float", "its unit-clustered standard error"),
    Column("fe", "float", "within (fixed-effects) estimate"),
    Column("fe_std_error", "float", "its unit-clustered standard error"),
    Column("gmm", "float", "the variant's GMM estimate"),
    Column("in_bounds", "bool", "gmm lies between fe and ols"),
    Column("observations", "int", "observations of the OLS and within regressions"),
    Column("units", "int", "units of the OLS and within regressions"),
))

TABLES = (VARIANTS, ESTIMATES, BOUNDS)

#: Dropping units (``[audit] influence``; :mod:`robustgmm.audit.dropping`): one row per
#: analysed variant × focus term × target.
INFLUENCE = Table("influence.csv", (
    Column("variant", "text", "variant id (the base model's rows first)"),
    Column("term", "text", "a focus term (a coefficient or a long-run effect)"),
    Column("target", "text",
           "sign (the estimate's sign reversed), significance (significance at alpha lost, "
           "or gained when the base is not significant) or opposite_significant (significant "
           "with the opposite sign)"),
    Column("units_dropped", "int", "units in the set found (when not reached: the units the "
           "greedy search had dropped when it stopped at max_drop_share)"),
    Column("share_dropped", "float", "units_dropped / the variant's units"),
    Column("reached", "bool", "the exact refit without the set reaches the target"),
    Column("estimate", "float", "the exact refit's estimate of the term without the set"),
    Column("std_error", "float", "its standard error (the variant's own estimator)"),
    Column("p_value", "float", "its two-sided normal p-value"),
    Column("dropped_units", "text", "the unit ids of the set, in the order dropped, separated by spaces"),
))

#: The most influential units of the base model: 20 rows per focus term.
INFLUENCE_UNITS = Table("influence_units.csv", (
    Column("term", "text", "a focus term of the base model"),
    Column("rank", "int", "1 = the unit whose removal moves the estimate most (first order)"),
    Column("unit", "text", "unit id"),
    Column("influence", "float", "the derivative of the estimate in the unit's weight "
           "(infinitesimal jackknife): dropping the unit changes the estimate by about "
           "minus this"),
    Column("change_in_se", "float", "-influence / the base standard error: the first-order "
           "change when the unit is dropped, in base standard errors"),
    Column("observations", "int", "the unit's level observations in the estimation sample"),
    Column("share_of_data", "float", "observations / all observations of the estimation sample"),
))

#: The greedy path of every search: one row per step (step 0 = no unit dropped).
INFLUENCE_PATH = Table("influence_path.csv", (
    Column("variant", "text", "variant id"),
    Column("term", "text", "a focus term"),
    Column("target", "text", "the target the greedy search pursued (as in influence.csv)"),
    Column("dropped", "int", "units dropped so far"),
    Column("estimate", "float", "the exact refit's estimate"),
    Column("std_error", "float", "its standard error"),
    Column("p_value", "float", "its two-sided normal p-value"),
))

#: Leave-one-period-out: the base model and the acceptable variants refitted without
#: each calendar period in turn.
PERIODS = Table("periods.csv", (
    Column("variant", "text", "variant id (the base model's rows first)"),
    Column("period", "int", "the calendar period left out"),
    Column("term", "text", "a focus term"),
    Column("estimate", "float", "estimate without that period"),
    Column("std_error", "float", "its standard error"),
    Column("p_value", "float", "its two-sided normal p-value"),
    Column("reason", "text", "why the refit failed (empty when it estimated)"),
))

#: The dropping-units files, written when ``[audit] influence`` is not "none" (listed
#: in manifest.json ``files``; the report reads them when listed).
DROPPING_TABLES = (INFLUENCE, INFLUENCE_UNITS, INFLUENCE_PATH, PERIODS)
DROPPING_FILES = tuple(t.file for t in DROPPING_TABLES)

#: The Monte Carlo of the grid (``robustgmm simulate``, ``audit --simulate``;
#: :mod:`robustgmm.montecarlo.replicate`): one row per planned variant × focus term.
SIMULATION = Table("simulation.csv", (
    Column("variant", "text", "variant id (as in variants.csv)"),
    Column("order", "int", "position in the plan, 1 = the base model"),
    Column("is_base", "bool", "True on the base model's rows"),
    Column("term", "text", "a focus term"),
    Column("true_value", "float",
           "its value in the simulated world (the base model's estimate, or the given truth)"),
    Column("mean", "float", "mean estimate over the replications where the variant was estimated"),
    Column("median", "float", "median estimate"),
    Column("bias", "float", "mean - true_value"),
    Column("relative_bias", "float", "bias / abs(true_value) (empty when the truth is 0)"),
    Column("sd", "float", "standard deviation of the estimates (the simulation SD, ddof 1)"),
    Column("rmse", "float", "root mean squared error about the truth"),
    Column("mean_std_error", "float", "mean reported standard error"),
    Column("se_ratio", "float", "mean_std_error / sd (below 1: reported errors too small)"),
    Column("coverage", "float", "share of 1 - alpha intervals (estimate +- z se) containing the truth"),
    Column("size", "float",
           "rejection rate of the true null H0: term = true_value at alpha (1 - coverage)"),
    Column("bias_mc_se", "float", "Monte Carlo standard error of the mean: sd / sqrt(reps_ok)"),
    Column("coverage_mc_se", "float",
           "Monte Carlo standard error of the coverage: sqrt(c (1 - c) / reps_ok)"),
    Column("reps_ok", "int", "replications in which the variant was estimated"),
    Column("reps", "int", "replications run"),
    Column("hansen_rejection", "float",
           "share of replications whose Hansen test rejects at alpha (a true null: its size)"),
    Column("ar2_rejection", "float",
           "share whose AR(2) test rejects at alpha (a true null: its size)"),
    Column("diff_hansen_level_rejection", "float",
           "share whose level-equation difference-in-Hansen test rejects at alpha (system "
           "GMM; a true null under mean stationarity)"),
), settings_after="is_base")
#: The CSV tables of a simulation.
SIMULATION_TABLES = (SIMULATION,)
CALIBRATION_FILE = "calibration.json"
#: Top-level keys of calibration.json (:func:`robustgmm.montecarlo.replicate.simulate`).
CALIBRATION_KEYS = ("format_version", "seed", "reps", "alpha", "truth", "truth_source",
                    "world", "fit", "failed")
#: The files a simulation adds to an audit folder (or writes alone, with a manifest).
SIMULATION_FILES = ("simulation.csv", CALIBRATION_FILE)
#: Columns of variants.csv filled by the verdicts (robustgmm.audit.verdicts), not by
#: the tables of the audit.
VERDICT_COLUMNS = ("evidence", "acceptable", "duplicate_of", "flags")

#: Top-level keys of verdict.json (built by :func:`robustgmm.audit.verdicts.judge`).
VERDICT_KEYS = ("alpha", "base_variant", "base_acceptable", "base_evidence", "base_statement",
                "closest_acceptable", "thresholds", "combination", "disclaimer", "variants",
                "diagnostics", "terms", "model", "rules")
#: Keys of one focus term's entry in verdict.json ``terms``.
TERM_KEYS = ("verdict", "reason", "summary", "base", "figures", "rules", "passed",
             "not_evaluated", "drivers", "key_driver", "influence")
#: Keys of one rule (a fired rule, a model flag, an entry of the rule catalogue).
RULE_KEYS = ("id", "description", "source", "threshold", "effect")

#: Keys of manifest.json that the report reads (the writer adds run figures,
#: timings and the environment, see docs/formats.md).
MANIFEST_KEYS = ("format_version", "package", "version", "model_file", "data_hash",
                 "outcome", "base_variant", "vary", "focus", "alpha", "thresholds", "files")

#: The files of an audit folder in the order written (manifest.json last, so a
#: folder with a manifest holds a complete audit).
FILES = ("variants.csv", "estimates.csv", "bounds.csv", "verdict.json", "manifest.json")
#: Optional: the true parameters of a simulated process ({"parameters": {term: value}}).
TRUTH_FILE = "truth.json"

#: Keys of the JSON of ``robustgmm fit --json`` (:meth:`FitResult.to_dict`).
FIT_KEYS = ("terms", "std_error_kind", "tests", "counts", "settings", "warnings", "long_run",
            "strength")
FIT_TERM_KEYS = ("estimate", "std_error", "z", "p_value")
FIT_TEST_KEYS = ("ar1", "ar2", "sargan", "hansen", "difference_hansen")
FIT_COUNT_KEYS = ("observations", "units", "instruments", "periods", "parameters",
                  "redundant_instruments", "instruments_per_unit")


# ---------------------------------------------------------------------------
def frame_in_order(table: Table, frame: pd.DataFrame, settings: Sequence[str] = ()) -> pd.DataFrame:
    """``frame`` with exactly the table's columns in file order (the writer's check:
    a column the writer forgot or invented is a bug, raised here)."""
    expected = table.names(settings)
    missing = [c for c in expected if c not in frame.columns]
    extra = [c for c in frame.columns if c not in expected]
    if missing or extra:
        raise AssertionError(f"{table.file}: writer columns differ from the format: "
                             f"missing {missing}, unexpected {extra}")
    return frame[expected]


def read_table(table: Table, path: Path, settings: Sequence[str],
               problems: list[str]) -> pd.DataFrame | None:
    """Read one CSV of the format, appending one line per problem to ``problems``
    (a missing file, a missing or unexpected column, a cell of the wrong kind).

    Text columns are read as strings; the other kinds are checked and left as pandas
    reads them (a whole-number column with a missing value is float, a boolean
    column with one is object), empty cells are missing values. Each column's type
    is inferred from the whole column (``low_memory=False``), so a long table is
    read as a short one is: never chunk by chunk, which would leave a setting
    column such as ``steps`` half integers and half text (with a DtypeWarning)."""
    if not path.is_file():
        problems.append(f"{path}: file missing (not an audit output folder? "
                        f"run `robustgmm audit MODEL.toml --out {path.parent}` first)")
        return None
    kinds = table.kinds(settings)
    try:
        frame = pd.read_csv(path, dtype={c: str for c, k in kinds.items() if k == "text"},
                            low_memory=False)
    except Exception as exc:  # pandas raises several parser error types
        first = str(exc).splitlines()[0] if str(exc) else ""
        problems.append(f"{path}: cannot be read as CSV ({exc.__class__.__name__}: {first})")
        return None
    found = table.problems(frame.columns, settings, path)
    if found:
        problems.extend(found)
        return None
    before = len(problems)
    for col, kind in kinds.items():
        values = frame[col]
        present = values[values.notna()]
        if present.empty:  # an empty table (every variant failed) or column
            continue
        if kind in ("int", "float"):
            if not pd.api.types.is_numeric_dtype(values) or pd.api.types.is_bool_dtype(values):
                wrong = present[pd.to_numeric(present, errors="coerce").isna()]
                shown = wrong.iloc[0] if len(wrong) else present.iloc[0]
                problems.append(f"{path}: column '{col}' holds {shown!r}, not a number")
            elif kind == "int" and (present % 1 != 0).any():
                problems.append(f"{path}: column '{col}' holds "
                                f"{present[present % 1 != 0].iloc[0]!r}, not a whole number")
        elif kind == "bool":
            wrong = present[~present.map(lambda v: isinstance(v, (bool,)) or
                                         type(v).__name__ == "bool_")]
            if len(wrong):
                problems.append(f"{path}: column '{col}' holds {wrong.iloc[0]!r}, "
                                "not True or False")
    return None if len(problems) > before else frame
