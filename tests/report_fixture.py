"""Audit folders written by the real writer, for the report tests.

Each folder is a real audit (:func:`robustgmm.audit.audit` then
:func:`robustgmm.audit.write_audit`) of the invented bakery process of
:mod:`robustgmm.demo` (known truth, ``demo.DEMO_TRUTH``) with columns renamed so that
the labels carry markup (to test escaping), and a noise regressor ``<b>lev</b>``
(true coefficient 0). ``tests/report/conftest.py`` builds them once per session; a
test that changes a file works on a copy.

The folders:

- ``main``: 64 variants. The endogenous regressor's role is varied (treated as
  exogenous it is not instrumented: Hansen rejects, so some estimated variants are
  not acceptable), and a sample without the only bakeries where the noise regressor
  moves cannot be estimated (failed variants with a reason).
- ``one``, ``two``: 1 and 2 variants; ``many``: 192 variants (above the figures'
  per-variant tick limit); ``tall``: four focus terms (48 variants); ``five``: five
  settings varied, two values each (32 variants, all estimated); ``slug``: two focus labels that share a file-name slug;
  ``roles``: a regressor's role varied (8 variants); ``skips``: ``last_lag`` a
  settings column with one value; ``thresholds``: alpha and every verdict threshold
  changed from its default; ``all_failed``: every variant fails.
"""
from __future__ import annotations

import json
import shutil
from pathlib import Path

from robustgmm import demo
from robustgmm.audit import audit, write_audit
from robustgmm.modelfile import spec_from_dict

FRAGILE_NAME = 'w<script>alert("x")</script>&'
ROBUST_NAME = "flour_price"
NOISE_NAME = "<b>lev</b>"
AR = "orders[t-1]"
FRAGILE = f"{FRAGILE_NAME}[t]"
ROBUST = f"{ROBUST_NAME}[t]"
NOISE = f"{NOISE_NAME}[t]"
ROLE_COLUMN = f"role:{FRAGILE_NAME}"
TRUTH = {AR: demo.DEMO_TRUTH["orders[t-1]"], FRAGILE: demo.DEMO_TRUTH["staff_hours[t]"],
         ROBUST: demo.DEMO_TRUTH["flour_price[t]"], NOISE: 0.0}


def _data():
    frame = demo.simulate_bakeries(demo.SEED).rename(columns={"staff_hours": FRAGILE_NAME})
    # an exogenous regressor with no effect (a fixed transformation of the year and
    # bakery, so the data need no second random stream)
    codes = frame["bakery"].str[1:].astype(int)
    frame[NOISE_NAME] = ((codes * 7919 + frame["year"] * 104729) % 1000) / 1000.0 - 0.5
    # ... that is twice the flour price outside the first 50 bakeries: a sample
    # without them cannot tell the two apart (every variant fails, with the reason;
    # a column constant in the model's own sample would be an input error instead)
    frame["tier"] = (codes <= 50).map({True: "first", False: "rest"})
    rest = frame["tier"] == "rest"
    frame.loc[rest, NOISE_NAME] = 2.0 * frame.loc[rest, ROBUST_NAME]
    frame[f"{ROBUST_NAME}_"] = frame[NOISE_NAME].iloc[::-1].to_numpy()
    return frame


def _model(vary: dict, *, focus=(AR, FRAGILE, ROBUST), extra_regressors=(), sample=None,
           alpha=None, thresholds=None) -> dict:
    regressors = [{"name": FRAGILE_NAME, "role": "endogenous"},
                  {"name": ROBUST_NAME, "role": "exogenous"},
                  {"name": NOISE_NAME, "role": "exogenous"}]
    regressors += [{"name": n, "role": "exogenous"} for n in extra_regressors]
    d = {"data": {"file": "panel.csv", "unit": "bakery", "period": "year"},
         "model": {"outcome": "orders", "regressors": regressors},
         "method": {"equations": "system", "steps": 2},
         "instruments": {"last_lag": 4, "form": "collapsed"},
         "audit": {"focus": list(focus), "vary": vary}}
    if not vary:
        del d["audit"]["vary"]
    if alpha is not None:
        d["audit"]["alpha"] = alpha
    if thresholds:
        d["audit"]["thresholds"] = dict(thresholds)
    if sample is not None:
        d["sample"] = sample
    return d


FOLDERS = {
    "main": _model({"equations": ["difference", "system"], "steps": [1, 2],
                    "form": ["per-period", "collapsed"],
                    "roles": {FRAGILE_NAME: ["endogenous", "exogenous"],
                              NOISE_NAME: ["exogenous", "endogenous"]},
                    "sample": [{"name": "without the first 50",
                                "exclude": {"column": "tier", "values": ["first"]}}]}),
    "one": _model({}),
    "two": _model({"steps": [1, 2]}),
    "many": _model({"equations": ["difference", "system"], "transform": ["fd", "fod"],
                    "steps": [1, 2, "iterated"], "form": ["per-period", "collapsed"],
                    "last_lag": [2, 3, 4, "all"], "errors": ["robust", "conventional"]}),
    # the figures at 3, 48 and 300 variants (tests/report/test_report_figures_scale.py)
    "three": _model({"steps": [1, 2, "iterated"]}),
    "forty_eight": _model({"equations": ["difference", "system"], "transform": ["fd", "fod"],
                           "steps": [1, 2], "form": ["per-period", "collapsed"],
                           "last_lag": [2, 3, 4]}),
    "three_hundred": _model({"equations": ["difference", "system"],
                             "transform": ["fd", "fod"], "steps": [1, 2, "iterated"],
                             "first_lag": [2, 3, 4, 5, 6], "last_lag": [3, 4, 5, 6, "all"]}),
    # four focus terms: table.tex needs two floats to fit the page
    "tall": _model({"equations": ["difference", "system"], "transform": ["fd", "fod"],
                    "steps": [1, 2], "form": ["per-period", "collapsed"],
                    "last_lag": [2, 3, 4]}, focus=(AR, FRAGILE, ROBUST, NOISE)),
    "five": _model({"equations": ["difference", "system"], "transform": ["fd", "fod"],
                    "steps": [1, 2], "form": ["per-period", "collapsed"],
                    "errors": ["robust", "conventional"]}),
    "slug": _model({"steps": [1, 2]}, focus=(AR, ROBUST, f"{ROBUST_NAME}_[t]"),
                   extra_regressors=(f"{ROBUST_NAME}_",)),
    "roles": _model({"steps": [1, 2], "form": ["per-period", "collapsed"],
                     "roles": {ROBUST_NAME: ["exogenous", "endogenous"]}}),
    "skips": _model({"steps": [1, 2], "last_lag": [4]}),
    # alpha and every threshold changed (the documents must follow verdict.json)
    "thresholds": _model({"equations": ["difference", "system"], "steps": [1, 2],
                          "form": ["per-period", "collapsed"], "last_lag": [2, 4]},
                         alpha=0.10, thresholds=dict(
                             hansen_reject=0.02, hansen_too_high=0.5, ar2_reject=0.2,
                             difference_hansen_reject=0.01, instruments_per_unit=0.05,
                             spread_in_se=1.5, significant_share=0.8,
                             uninformative_se_ratio=2.0, instruments_per_unit_warn=0.02,
                             count_untestable=True)),
    "all_failed": _model({"steps": [1, 2, "iterated"]},
                         sample={"name": "without the first 50",
                                 "exclude": {"column": "tier", "values": ["first"]}}),
}


def build_folder(name: str, root) -> Path:
    """Run the real audit ``name`` of :data:`FOLDERS` and write its folder (with a
    truth.json) under ``root``; return the folder."""
    work = Path(root) / name
    work.mkdir(parents=True)
    _data().to_csv(work / "panel.csv", index=False)
    spec = spec_from_dict(FOLDERS[name], base_dir=work, source=f"{name}.toml")
    out = work / "out"
    write_audit(audit(spec, jobs=1), out, model_file=f"{name}.toml")
    (out / "truth.json").write_text(json.dumps({"parameters": TRUTH}))
    return out


def copy_folder(folder: Path, dest) -> Path:
    """A writable copy of a built folder (the session's folders are shared)."""
    dest = Path(dest)
    shutil.copytree(folder, dest)
    return dest


def rejudge(folder: Path) -> None:
    """After a test edits variants.csv, write its verdict columns and verdict.json
    again, as the audit would have for that table (the rules run in one place)."""
    import pandas as pd
    from robustgmm.audit import verdicts
    folder = Path(folder)
    manifest = json.loads((folder / "manifest.json").read_text())
    spec = spec_from_dict(manifest["spec"], base_dir=folder.parent)
    variants = pd.read_csv(folder / "variants.csv", dtype={"variant": str, "duplicate_of": str})
    estimates = pd.read_csv(folder / "estimates.csv", dtype={"variant": str})
    bounds = pd.read_csv(folder / "bounds.csv", dtype={"variant": str})
    evaluation = verdicts.evaluate(spec, variants.assign(duplicate_of=""), estimates, bounds)
    for col in ("evidence", "acceptable", "duplicate_of", "flags"):
        variants[col] = evaluation.columns[col].to_numpy()
    variants.to_csv(folder / "variants.csv", index=False)
    (folder / "verdict.json").write_text(json.dumps(evaluation.verdict.to_dict(), indent=2))
