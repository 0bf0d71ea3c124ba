"""Audit one model: spec → panels → grid → runner → bounds → verdicts → tables.

:func:`audit` returns an :class:`AuditResult` whose tables are the files of the audit
folder; :func:`write_audit` writes them atomically. The files, their columns and
their order are defined in :mod:`robustgmm.contract` (prose: ``docs/formats.md``):
``variants.csv`` (one row per variant, plan order, base first), ``estimates.csv``
(one row per ok variant × term, including the constant and period dummies),
``bounds.csv`` (one row per ok variant × AR term, base rows first),
``verdict.json`` (:func:`robustgmm.audit.verdicts.judge`) and ``manifest.json``.
Everything but the manifest is identical whatever the number of jobs and whether
results came from the cache.
"""
from __future__ import annotations

import datetime as _dt
import platform
import time
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any, Mapping

import numpy as np
import pandas as pd

from .. import __version__
from . import dropping, grid, runner, verdicts
from .. import contract
from .. import output as folder
from .grid import SKIPPED, plan_frame  # noqa: F401  (re-exported: robustgmm.audit.plan_frame)
from ..atomic import atomic_write_csv, atomic_write_json
from ..spec import Spec, settings_of

__all__ = ["AuditResult", "audit", "write_audit", "plan_frame", "default_cache_dir"]


@dataclass(frozen=True)
class AuditResult:
    """The audit of one model: the contract tables, the verdict and the manifest."""

    variants: pd.DataFrame
    estimates: pd.DataFrame
    bounds: pd.DataFrame
    verdict: Mapping[str, Any]
    manifest: Mapping[str, Any]
    spec: Spec | None = field(default=None, repr=False, compare=False)
    #: the Monte Carlo of the grid (``audit(..., simulate=R)``), else None
    simulation: Any = field(default=None, repr=False, compare=False)
    #: the dropping-units tables (:class:`robustgmm.audit.dropping.DroppingTables`;
    #: None with ``[audit] influence = "none"``)
    dropping: Any = field(default=None, repr=False, compare=False)

    def term_verdicts(self) -> dict[str, str]:
        return {t: v["verdict"] for t, v in self.verdict["terms"].items()}


def default_cache_dir(out_dir) -> Path:
    """The cache folder the command line uses: inside the output folder, so that a
    rerun with the same ``--out`` resumes."""
    return Path(out_dir) / ".cache"


def audit(spec: Spec, *, jobs: int | None = None, cache_dir=None, progress: bool | None = False,
          backend: str | None = None, on_error: str = "raise", simulate: int | None = None,
          seed: int = 0, simulate_options: dict | None = None,
          start_workers: bool = False, notify=None) -> AuditResult:
    """Estimate every variant of ``spec`` and judge the focus terms.

    ``jobs``: the most workers (None: every core); local worker processes start
    only when the estimated work repays their start-up (:mod:`robustgmm.audit.cost`),
    or always with ``start_workers=True``; ``notify(line)`` hears which was chosen.
    ``cache_dir``: folder of the variant cache
    (None: no cache). ``progress``: tqdm bar on stderr (None: when it is a terminal).
    ``backend``: a joblib backend name (default loky; "dask" with a distributed
    client). ``on_error``: what an exception other than
    :class:`~robustgmm.errors.EstimationError` does — "raise" (default: it is a bug
    and stops the audit with its traceback) or "record" (the variant is recorded
    failed and the audit goes on). A variant that cannot be estimated on its data
    (EstimationError and its subclasses) is always a failed variant. ``simulate``:
    also run that many replications of the grid in a world calibrated to the data
    (seed ``seed``; ``simulate_options``: ``truth``, ``initial``, ``heteroskedastic``
    of :func:`robustgmm.montecarlo.simulate`, the model file's ``[simulate]``).
    """
    runner.check_on_error(on_error)
    t0 = time.perf_counter()
    grid.check_base(spec)
    frame = grid.read_for_splits(spec)
    spec = grid.resolve_splits(spec, frame)  # one subgroup sample per value of a split column
    grid.check_size(spec)
    panels = grid.load_panels(spec, frame=frame)
    t_load = time.perf_counter()
    # counts come with each estimation; planning here only does the cheap checks
    planned = grid.plan(spec, panels, counts=False)
    t_plan = time.perf_counter()
    # the base model's dropping-units analysis needs only its specification: it runs
    # in the variants' pool (its searches are the longest tasks of most audits, and
    # run after the variants they would leave a worker idle); kept when the base
    # model estimates, else dropped with it
    base_done: dict = {}
    planned_base = [v.id for v in planned if v.is_base and v.status == grid.PLANNED]
    alongside = ([dropping.work(spec, planned, panels, planned_base, base_done)]
                 if spec.influence != "none" and planned_base else [])
    outcomes, stats = runner.run_variants(planned, panels, jobs=jobs, cache_dir=cache_dir,
                                          progress=progress, backend=backend,
                                          on_error=on_error, start_workers=start_workers,
                                          notify=notify, alongside=alongside)
    t_run = time.perf_counter()
    simulation = None
    if simulate is not None:
        from ..montecarlo.replicate import simulate as run_simulation
        simulation = run_simulation(spec, reps=simulate, seed=seed, jobs=jobs,
                                    cache_dir=cache_dir, progress=progress, backend=backend,
                                    planned=planned, panels=panels,
                                    start_workers=start_workers, notify=notify,
                                    **dict(simulate_options or {}))
    t_sim = time.perf_counter()
    variants, estimates, bounds = _tables(spec, planned, outcomes)
    sim_summary = None if simulation is None else simulation.summary
    # the variant-level rules name the judged variants the dropping-units analysis
    # covers; the term rules (few_units_flip among them) then read its tables: every
    # rule evaluated once
    classified = verdicts.classify(spec, variants, estimates, bounds, sim_summary)
    t_verdict = time.perf_counter()
    base_row = variants[variants["is_base"].astype(bool)]
    base_id = str(base_row["variant"].iloc[0]) if len(base_row) else None
    base_ok = bool(len(base_row)) and str(base_row["status"].iloc[0]) == runner.OK
    ids = dropping.scope_ids(spec, base_id, base_ok, classified.judged)
    tables = None
    if spec.influence != "none":
        tables = dropping.analyse(spec, planned, panels, ids, estimates, jobs=jobs,
                                  backend=backend, start_workers=start_workers,
                                  notify=notify, done=base_done if base_ok else None,
                                  earlier={"jobs": stats.jobs, "backend": stats.backend})
    t_influence = time.perf_counter()
    evaluation = verdicts.conclude(classified, None if tables is None else tables.influence)
    verdict = evaluation.verdict.to_dict()
    extra = evaluation.columns
    variants = contract.frame_in_order(
        contract.VARIANTS, variants.assign(
            evidence=extra["evidence"], acceptable=extra["acceptable"],
            duplicate_of=extra["duplicate_of"], flags=extra["flags"]),
        grid.setting_columns(spec))
    t_end = time.perf_counter()

    base_panel = panels[grid.sample_key(spec.sample)]
    manifest = {
        "package": "robustgmm",
        "version": __version__,
        "format_version": contract.FORMAT_VERSION,
        "created_utc": _dt.datetime.now(_dt.timezone.utc).isoformat(timespec="seconds"),
        "model_file": spec.source,
        "data_file": None if spec.data_file is None else str(spec.data_file),
        "data_hash": getattr(base_panel, "data_hash", None),
        "sample_hashes": {s.name: getattr(panels[grid.sample_key(s)], "data_hash", None)
                          for s in grid.samples_of(spec)
                          if not isinstance(panels[grid.sample_key(s)], str)},
        "outcome": spec.outcome,
        "base_variant": verdict.get("base_variant"),
        "settings": dict(settings_of(spec)),
        "spec": _spec_dict(spec),
        "vary": grid.setting_columns(spec),
        "focus": list(spec.focus_terms()),
        "alpha": spec.alpha,
        "thresholds": verdicts.threshold_values(spec),
        "counts": verdict["variants"],
        "run": {**stats.to_dict(),
                **({f"influence_{k}": v for k, v in tables.dispatch.items()}
                   if tables is not None else {})},
        "timings": {
            "load_seconds": t_load - t0,
            "plan_seconds": t_plan - t_load,
            "run_seconds": t_run - t_plan,
            "simulation_seconds": t_sim - t_run,
            "verdict_seconds": (t_verdict - t_sim) + (t_end - t_influence),
            "influence_seconds": t_influence - t_verdict,
            "total_seconds": t_end - t0,
        },
        "environment": {"python": platform.python_version(), "numpy": np.__version__,
                        "pandas": pd.__version__, "platform": platform.platform()},
        "disclaimer": verdicts.DISCLAIMER,
    }
    if simulation is not None:
        manifest["simulation"] = dict(simulation.run)
    if tables is not None:
        manifest["influence"] = dict(tables.run)
    return AuditResult(variants=variants, estimates=estimates, bounds=bounds,
                       verdict=verdict, manifest=manifest, spec=spec, simulation=simulation,
                       dropping=tables)


def _spec_dict(spec: Spec) -> dict | None:
    to_dict = getattr(spec, "to_dict", None)
    if to_dict is None:
        return None
    try:
        return to_dict()
    except Exception:  # the manifest must not fail an audit over a display detail
        return None


def _p(test) -> float:
    return np.nan if test is None else float(test.p_value)


def _df(test) -> int | None:
    return None if test is None else test.df


def _unavailable(fit) -> str:
    """The tests of a fit that are not reported, each with its reason ("name: reason",
    joined by " | "): e.g. Sargan in system GMM, a difference-in-Hansen group whose
    removal leaves the model unidentified."""
    items = [(name, t) for name, t in fit.tests.items() if t is not None]
    items += [(f"difference-in-Hansen {g}", t) for g, t in fit.difference_hansen.items()]
    names = {"rank_lm": "rank test", "conditional_f": "conditional F"}
    for kind, tests in fit.strength.items():
        if kind in names:  # the Wald form shares the LM form's reason
            items += [(f"{names[kind]} {n}", t) for n, t in tests.items() if t is not None]
    return " | ".join(f"{name}: {t.reason}" for name, t in items if t.reason)


def _bounds_warning(text: str) -> str:
    """A note about a variant's OLS/within bounds, as written in variants.csv: the one
    place that adds the "bounds:" prefix (the bounds' own errors come without it)."""
    return "bounds: " + text


def _gmm_estimates(spec: Spec, fit) -> dict[str, float]:
    """The GMM estimate of each term (coefficients, then long-run effects), and of the
    sum of the AR coefficients (the persistence the bounds check when the outcome has
    several lags)."""
    gmm = {t.label: t.estimate for t in fit.terms + fit.long_run}
    ar = list(spec.ar_terms())
    if len(ar) > 1 and all(a in gmm for a in ar):
        from .bounds import sum_label
        gmm[sum_label(spec)] = float(sum(gmm[a] for a in ar))
    return gmm


def _strength_columns(fit) -> dict:
    """The instrument-strength columns of variants.csv from a fit: the rank test
    p-values (LM form) of the whole system and of each equation, the rank Wald F of
    the system and the smallest conditional F with its term."""
    st = fit.strength
    lm, wald, cond = st.get("rank_lm", {}), st.get("rank_wald", {}), st.get("conditional_f", {})
    out = {"underid_p": _p(lm.get("system")),
           "underid_p_transformed": _p(lm.get("transformed", lm.get("system") if
                                              "level" not in lm else None)),
           "underid_p_level": _p(lm.get("level"))}
    w = wald.get("system")
    out["rk_f"] = (w.statistic / w.df if w is not None and np.isfinite(w.statistic)
                   and w.df else np.nan)
    fs = {term: t.statistic for term, t in cond.items()
          if t is not None and np.isfinite(t.statistic)}
    term = min(fs, key=fs.get) if fs else None
    out["weak_f_min"] = fs[term] if term else np.nan
    out["weak_f_term"] = term
    return out


def _tables(spec: Spec, planned, outcomes) -> tuple[pd.DataFrame, pd.DataFrame, pd.DataFrame]:
    columns = grid.setting_columns(spec)
    vrows, erows, brows = [], [], []
    for v in planned:
        o = outcomes.get(v.id)
        row: dict[str, Any] = {"variant": v.id, "order": v.order, "is_base": v.is_base}
        row.update(v.settings_dict())
        row["duplicate_of"] = getattr(v, "duplicate_of", "")
        status = v.status if o is None else o.status
        reason = v.reason if o is None else o.reason
        if status == runner.FAILED and o is not None and grid.is_underidentified(o.error_type):
            status = SKIPPED  # not identified: an impossible combination, as in the plan
        row.update(status=status, reason=reason, instruments=v.instruments,
                   parameters=v.parameters, units=v.units, observations=None)
        fit = o.fit if (o is not None and o.status == runner.OK) else None
        bnd = o.bounds if (o is not None and o.status == runner.OK) else None
        row.update(hansen_p=np.nan, hansen_df=None, sargan_p=np.nan, sargan_df=None,
                   ar1_p=np.nan, ar2_p=np.nan, diff_hansen_level_p=np.nan,
                   diff_hansen_level_df=None, underid_p=np.nan, rk_f=np.nan,
                   underid_p_transformed=np.nan, underid_p_level=np.nan, weak_f_min=np.nan,
                   weak_f_term=None, std_error_kind=None, ar_term=None,
                   ar_coefficient=np.nan, ar_ols=np.nan, ar_fe=np.nan, in_bounds=None,
                   unavailable_tests="", warnings="")
        if fit is not None:
            c = fit.counts
            tests = fit.tests
            hansen = tests.get("hansen")
            level_test = fit.difference_hansen.get(verdicts.LEVEL_GROUP)
            row.update(instruments=c.instruments, parameters=c.parameters, units=c.units,
                       observations=c.observations, hansen_p=_p(hansen),
                       hansen_df=_df(hansen),
                       sargan_p=_p(tests.get("sargan")), sargan_df=_df(tests.get("sargan")),
                       ar1_p=_p(tests.get("ar1")),
                       ar2_p=_p(tests.get("ar2")),
                       diff_hansen_level_p=_p(level_test),
                       diff_hansen_level_df=_df(level_test),
                       std_error_kind=fit.std_error_kind,
                       **_strength_columns(fit),
                       unavailable_tests=_unavailable(fit),
                       warnings=" | ".join(fit.warnings))
            for t in fit.terms + fit.long_run:  # the long-run effects follow the coefficients
                erows.append({"variant": v.id, "term": t.label, "estimate": t.estimate,
                              "std_error": t.std_error, "z": t.z, "p_value": t.p_value})
            gmm = _gmm_estimates(v.spec, fit)  # the variant's own lags
            if bnd is not None and "terms" in bnd:
                for b in bnd["terms"]:
                    est = gmm.get(b["term"], np.nan)
                    brows.append({"variant": v.id, "is_base": v.is_base, "term": b["term"],
                                  "ols": b["ols"], "ols_std_error": b["ols_std_error"],
                                  "fe": b["fe"], "fe_std_error": b["fe_std_error"],
                                  "gmm": est, "in_bounds": _inside(est, b["ols"], b["fe"]),
                                  "observations": bnd["observations"], "units": bnd["units"]})
                pers = next(b for b in bnd["terms"] if b["term"] == bnd["persistence"])
                est = gmm.get(pers["term"], np.nan)
                row.update(ar_term=pers["term"], ar_coefficient=est, ar_ols=pers["ols"],
                           ar_fe=pers["fe"], in_bounds=_inside(est, pers["ols"], pers["fe"]))
                if bnd.get("dropped"):
                    row["warnings"] = " | ".join(filter(None, [
                        row["warnings"], _bounds_warning(
                            "the within estimator drops the time-invariant term(s) "
                            + ", ".join(bnd["dropped"]) + " (absorbed by the unit effect)")]))
            elif bnd is not None:
                row["warnings"] = " | ".join(filter(None, [row["warnings"],
                                                           _bounds_warning(bnd.get("error", ""))]))
        row["instruments_per_unit"] = (row["instruments"] / row["units"]
                                       if row["instruments"] is not None and row["units"] else np.nan)
        vrows.append(row)

    # the verdict columns are added by the verdicts (see audit())
    lead = [c for c in contract.VARIANTS.names(columns) if c not in contract.VERDICT_COLUMNS]
    variants = pd.DataFrame(vrows, columns=lead)
    for col in ("instruments", "parameters", "units", "observations", "hansen_df",
                "sargan_df", "diff_hansen_level_df"):
        variants[col] = variants[col].astype("Int64")
    variants["in_bounds"] = variants["in_bounds"].astype("boolean")
    estimates = pd.DataFrame(erows, columns=contract.ESTIMATES.names())
    bounds = pd.DataFrame(brows, columns=contract.BOUNDS.names())
    if len(bounds):
        # base rows first (one row per AR term of the base model), then plan order
        bounds = bounds.sort_values("is_base", ascending=False, kind="mergesort")
        bounds = bounds.reset_index(drop=True)
    bounds["in_bounds"] = bounds["in_bounds"].astype("boolean")
    return variants, estimates, bounds


def _inside(est, ols, fe) -> bool | None:
    vals = [est, ols, fe]
    if any(v is None or not np.isfinite(v) for v in vals):
        return None
    return bool(min(ols, fe) <= est <= max(ols, fe))


def write_audit(result: AuditResult, out_dir, *, model_file=None, report=None) -> Path:
    """Write the audit into ``out_dir`` (created if needed) as one complete unit.

    Writes variants.csv, estimates.csv, bounds.csv, verdict.json and manifest.json —
    and, when ``report`` is given (``report(folder) -> [paths written]``, e.g.
    :func:`robustgmm.report.build_report`), the report built from them — into a
    staging folder, then swaps them in by renames, the manifest last
    (:func:`robustgmm.output.publish`): a folder with a manifest always holds
    one complete audit, whatever fails or is killed midway. Files an earlier audit
    wrote there and this one does not are removed; nothing else is touched. The
    folder is locked against a second audit for the duration."""
    out = Path(out_dir)
    out.mkdir(parents=True, exist_ok=True)

    def write(stage: Path) -> list[str]:
        settings = result.manifest["vary"]
        for table, frame in zip(contract.TABLES, (result.variants, result.estimates,
                                                  result.bounds)):
            atomic_write_csv(stage / table.file, contract.frame_in_order(table, frame, settings))
        atomic_write_json(stage / "verdict.json", result.verdict)
        extra = result.simulation.write(stage) if result.simulation is not None else []
        if result.dropping is not None:
            for table, frame in zip(contract.DROPPING_TABLES, result.dropping.frames()):
                atomic_write_csv(stage / table.file, contract.frame_in_order(table, frame))
                extra.append(table.file)
        manifest = dict(result.manifest)
        if model_file is not None:
            manifest["model_file"] = str(model_file)
        manifest["files"] = list(contract.FILES) + extra
        atomic_write_json(stage / "manifest.json", manifest)
        names = list(contract.FILES) + extra
        if report is not None:
            names += [str(Path(p).relative_to(stage)) for p in report(stage)]
        return names

    folder.publish(out, write)
    return out
