"""Invented scenarios with a known data-generating process: the demo and the examples.

Nothing here is real data: the units, places and variables are fictional, and every
number is drawn from :func:`numpy.random.default_rng` with a fixed seed and rounded to
six decimals before it is written, so each CSV is exactly reproducible. Each scenario
writes its data, its model file and ``truth.json`` (the true parameters).

**Demo** (:func:`run_demo`, ``robustgmm demo``): 400 fictional bakeries in the
invented county of Norland, yearly 2012-2021::

    orders_it      = 0.50 orders_i,t-1 + 0.08 staff_hours_it - 0.30 flour_price_it
                     + eta_i + eps_it
    staff_hours_it = 0.97 staff_hours_i,t-1 + 0.30 eta_i + 0.40 eps_it + v_it
    flour_price_it = 0.50 flour_price_i,t-1 + u_it

``eta_i`` (bakery effect), ``eps_it``, ``v_it``, ``u_it`` are independent N(0, 1).
Staff hours respond to the current order shock (``0.40 eps_it``), so they are
*endogenous*; the flour price is *strictly exogenous*. Every series starts at its
stationary mean given ``eta_i`` and runs a 50-year burn-in, so the panel is
mean-stationary and the level-equation instruments of system GMM are valid
(Blundell & Bond 1998).

What the audit shows: the autoregressive coefficient and the flour-price effect are
large relative to their sampling noise and keep sign and significance in every
variant (robust). The staff-hours effect is small and staff hours are nearly a
random walk, so their lagged levels are weak instruments for their differences
(Blundell & Bond 1998): its estimate is noisy, and whether it is "significant"
depends on the instrument set (per-period instruments are many and pull the
estimate toward the biased OLS value, Roodman 2009; collapsed ones are few and
imprecise). The audit calls it fragile although its sign is right. In trials with
seeds 0-11 (robustgmm 0.1.0) the same robust/fragile/robust pattern appeared in 10
of 12 datasets (in one the base model failed its Hansen test, making every verdict
inconclusive; in one staff hours came out robust); the demo uses one fixed seed,
:data:`SEED`, whose 48 variants all pass their specification tests.
Dropping units (``[audit] influence = "base"``, the 400 bakeries named by ``[labels]
bakery = "bakeries"``): no set of up to 5% of the bakeries overturns the
autoregressive or the flour-price conclusion, while dropping 6 of 400 bakeries
(1.5%) makes the (insignificant) staff-hours effect significant — just above the 1%
of the ``few_units_flip`` rule, so it stays a number in the report, not a verdict.

**Examples** (:func:`write_examples`, committed under ``examples/``):

- ``clinics`` — 250 fictional rural clinics, 2014-2022: waiting times with a
  *predetermined* regressor (nurse staffing reacts to last year's waiting-time
  shock, not this year's), estimated with *forward orthogonal deviations*; the
  audit varies the transform, the regressor's role and the lag structure (a second
  lag of the outcome and a lag of staffing, both zero in the process).
- ``orchards`` — 300 fictional fruit cooperatives in three regions, 2010-2019, an
  *unbalanced panel with gaps*: the irrigation effect is zero in the highland region
  and positive elsewhere, so *sample filters* (dropping a region, a later start,
  one subgroup per region with ``split``) move its estimate (the highland subgroup,
  where the effect is zero, makes the irrigation verdict fragile).
"""
from __future__ import annotations

import dataclasses
import shutil
from dataclasses import dataclass, field
from pathlib import Path
from typing import Callable

import numpy as np
import pandas as pd

from .atomic import atomic_write_json, atomic_write_text
from .simulate import PanelProcess, long_frame, simulate_arrays

BURN_IN = 50
TRUTH_NAME = "truth.json"


@dataclass(frozen=True)
class Scenario:
    """An invented scenario: its simulator, model file and true parameters."""

    name: str
    description: str
    data_name: str
    model_name: str
    model_toml: str
    truth: dict
    process: dict
    roles: dict
    simulate: Callable[[int], pd.DataFrame]
    seed: int
    expected: dict = field(default_factory=dict)

    def truth_document(self) -> dict:
        return {"scenario": self.name, "description": self.description, "seed": self.seed,
                "parameters": dict(self.truth), "process": dict(self.process),
                "roles": dict(self.roles), "expected": dict(self.expected)}

    def write(self, folder) -> Path:
        """Write data, model file and truth.json into ``folder``; return the model path."""
        folder = Path(folder)
        folder.mkdir(parents=True, exist_ok=True)
        frame = self.simulate(self.seed)
        atomic_write_text(folder / self.data_name,
                          frame.to_csv(index=False, float_format="%.6f", lineterminator="\n"))
        atomic_write_json(folder / TRUTH_NAME, self.truth_document())
        return atomic_write_text(folder / self.model_name, self.model_toml)


def _round(frame: pd.DataFrame, columns) -> pd.DataFrame:
    for col in columns:
        frame[col] = frame[col].round(6)
    return frame


def _frame(arrays: dict, units, unit: str, years, names, round_: bool = True) -> pd.DataFrame:
    """The long frame of a scenario: the simulated ``y``, ``x``, ``w`` under their
    scenario names, sorted by unit then year."""
    named = dict(zip(names, (arrays["y"], arrays["x"], arrays["w"])))
    frame = long_frame(units, years, named, unit=unit, period="year")
    return _round(frame, names) if round_ else frame


# ---------------------------------------------------------------------------
# the demo: Norland bakeries

DEMO_TRUTH = {"orders[t-1]": 0.50, "staff_hours[t]": 0.08, "flour_price[t]": -0.30}
DEMO_PROCESS = {"rho_staff_hours": 0.97, "staff_hours_on_effect": 0.30,
                "staff_hours_on_shock": 0.40, "rho_flour_price": 0.50,
                "sd_effect": 1.0, "sd_shock": 1.0, "sd_staff_hours_noise": 1.0,
                "sd_flour_price_noise": 1.0, "units": 400, "first_year": 2012, "years": 10}


def simulate_bakeries(seed: int, process: dict = DEMO_PROCESS,
                      truth: dict = DEMO_TRUTH) -> pd.DataFrame:
    """Columns bakery, year, orders, staff_hours, flour_price: the process of
    :mod:`robustgmm.simulate` with staff hours endogenous (they react to the current
    shock) and an autoregressive flour price."""
    p = process
    proc = PanelProcess(rho=truth["orders[t-1]"], beta=truth["staff_hours[t]"],
                        gamma=truth["flour_price[t]"], rho_x=p["rho_staff_hours"],
                        tau=p["staff_hours_on_effect"], theta=p["staff_hours_on_shock"],
                        sigma_eta=p["sd_effect"], sigma_eps=p["sd_shock"],
                        sigma_v=p["sd_staff_hours_noise"], rho_w=p["rho_flour_price"],
                        sigma_w=p["sd_flour_price_noise"], burn_in=BURN_IN)
    arrays = simulate_arrays(np.random.default_rng(seed), p["units"], p["years"], proc,
                             heteroskedastic=False, draw_w_start=True)
    return _frame(arrays, [f"B{i + 1:03d}" for i in range(p["units"])], "bakery",
                  p["first_year"] + np.arange(p["years"]), ("orders", "staff_hours", "flour_price"))


DEMO_MODEL = """\
# Demo model: an invented scenario (fictional bakeries in the invented county of
# Norland) with a known data-generating process; see robustgmm/demo.py and
# truth.json. Written by `robustgmm demo`.

[data]
file = "norland_bakeries.csv"
unit = "bakery"
period = "year"

[model]
outcome = "orders"
outcome_lags = [1]
time_effects = true

[[model.regressors]]
name = "staff_hours"
lags = [0]
role = "endogenous"

[[model.regressors]]
name = "flour_price"
lags = [0]
role = "exogenous"

[method]
equations = "system"
transform = "fd"
steps = 2
errors = "robust"

[instruments]
first_lag = 2
last_lag = 4
form = "collapsed"

[audit]
focus = ["orders[t-1]", "staff_hours[t]", "flour_price[t]"]
alpha = 0.05
# dropping units: which handful of bakeries would overturn a conclusion of the base model
influence = "base"

[audit.vary]
equations = ["difference", "system"]
transform = ["fd", "fod"]
steps = [1, 2]
form = ["per-period", "collapsed"]
last_lag = [3, 4, "all"]

[labels]
bakery = "bakeries"   # how sentences name the units
"""

DEMO = Scenario(
    name="norland_bakeries",
    description=("invented demo scenario: 400 fictional bakeries in Norland, 2012-2021; "
                 "see robustgmm/demo.py"),
    data_name="norland_bakeries.csv", model_name="norland_bakeries.toml",
    model_toml=DEMO_MODEL, truth=DEMO_TRUTH, process=DEMO_PROCESS,
    roles={"staff_hours": "endogenous", "flour_price": "exogenous"},
    simulate=simulate_bakeries, seed=6,
    expected={"orders[t-1]": "robust", "flour_price[t]": "robust",
              "staff_hours[t]": "fragile: small effect, weak instruments (persistent regressor)"},
)
SEED = DEMO.seed


# ---------------------------------------------------------------------------
# example 1: clinics (predetermined regressor, forward orthogonal deviations)

CLINICS_TRUTH = {"wait_days[t-1]": 0.60, "nurses[t]": -0.25, "outbreak[t]": 0.20}
CLINICS_PROCESS = {"rho_nurses": 0.70, "nurses_on_effect": 0.30,
                   "nurses_on_last_shock": 0.50, "units": 250, "first_year": 2014,
                   "years": 9}


def simulate_clinics(seed: int) -> pd.DataFrame:
    """Columns clinic, year, wait_days, nurses, outbreak.

    ``nurses_it = 0.7 nurses_i,t-1 + 0.3 mu_i + 0.5 eps_i,t-1 + v_it``: staffing
    reacts to last year's waiting-time shock, so nurses are predetermined (correlated
    with past shocks, not with the current one) rather than endogenous."""
    p, b = CLINICS_PROCESS, CLINICS_TRUTH
    proc = PanelProcess(rho=b["wait_days[t-1]"], beta=b["nurses[t]"], gamma=b["outbreak[t]"],
                        rho_x=p["rho_nurses"], tau=p["nurses_on_effect"], theta=0.0,
                        lam=p["nurses_on_last_shock"], burn_in=BURN_IN)
    arrays = simulate_arrays(np.random.default_rng(seed), p["units"], p["years"], proc,
                             heteroskedastic=False)
    return _frame(arrays, [f"C{i + 1:03d}" for i in range(p["units"])], "clinic",
                  p["first_year"] + np.arange(p["years"]), ("wait_days", "nurses", "outbreak"))


CLINICS_MODEL = """\
# Example: invented scenario (fictional rural clinics) with a known data-generating
# process; see robustgmm/demo.py and truth.json.
# Shows: a predetermined regressor, forward orthogonal deviations and the lag
# structure in the audit (a second lag of the outcome, a lag of the regressor) and
# the long-run effect of the regressor as a focus term.

[data]
file = "clinics.csv"
unit = "clinic"
period = "year"

[model]
outcome = "wait_days"
outcome_lags = [1]
time_effects = true

[[model.regressors]]
name = "nurses"
lags = [0]
role = "predetermined"    # reacts to last year's shock: lags from t-1 are valid instruments

[[model.regressors]]
name = "outbreak"
lags = [0]
role = "exogenous"

[method]
equations = "system"
transform = "fod"          # forward orthogonal deviations (Arellano & Bover 1995)
steps = 2

[instruments]
first_lag = 2
last_lag = 4
form = "collapsed"

[audit]
focus = ["wait_days[t-1]", "nurses[t]", "nurses[long-run]"]   # and the long-run effect of staffing

[audit.vary]
transform = ["fd", "fod"]
equations = ["difference", "system"]
outcome_lags = [[1], [1, 2]]   # the referee's first question: a second lag of the outcome

[audit.vary.lags]
nurses = [[0], [0, 1]]         # and last year's staffing

[audit.vary.roles]
nurses = ["predetermined", "endogenous"]
"""

CLINICS = Scenario(
    name="clinics",
    description="invented example: 250 fictional rural clinics, 2014-2022; see robustgmm/demo.py",
    data_name="clinics.csv", model_name="clinics.toml", model_toml=CLINICS_MODEL,
    truth=CLINICS_TRUTH, process=CLINICS_PROCESS,
    roles={"nurses": "predetermined", "outbreak": "exogenous"},
    simulate=simulate_clinics, seed=11,
)


# ---------------------------------------------------------------------------
# example 2: orchards (unbalanced panel with gaps, sample filters)

ORCHARDS_TRUTH = {"harvest[t-1]": 0.40, "irrigation[t]": 0.30, "frost_days[t]": -0.15}
ORCHARDS_PROCESS = {"rho_irrigation": 0.80, "irrigation_on_effect": 0.20,
                    "irrigation_on_shock": 0.30, "irrigation_effect_highland": 0.0,
                    "share_rows_missing": 0.05, "units": 300, "first_year": 2010, "years": 10,
                    "regions": ["coast", "valley", "highland"]}


def simulate_orchards(seed: int) -> pd.DataFrame:
    """Columns coop, year, region, harvest, irrigation, frost_days.

    The irrigation effect is ``irrigation[t]`` (0.30) on the coast and in the valley
    and 0 in the highland region. About 5% of unit-years are removed at random,
    leaving gaps in the calendar (the lag of a year after a gap is missing)."""
    rng = np.random.default_rng(seed)
    p, b = ORCHARDS_PROCESS, ORCHARDS_TRUTH
    n, T = p["units"], p["years"]
    region = np.array(p["regions"])[rng.integers(0, 3, n)]
    beta = np.where(region == "highland", p["irrigation_effect_highland"], b["irrigation[t]"])
    proc = PanelProcess(rho=b["harvest[t-1]"], beta=b["irrigation[t]"], gamma=b["frost_days[t]"],
                        rho_x=p["rho_irrigation"], tau=p["irrigation_on_effect"],
                        theta=p["irrigation_on_shock"], burn_in=BURN_IN)
    arrays = simulate_arrays(rng, n, T, proc, beta=beta, heteroskedastic=False)
    frame = _frame(arrays, [f"K{i + 1:03d}" for i in range(n)], "coop",
                   p["first_year"] + np.arange(T), ("harvest", "irrigation", "frost_days"),
                   round_=False)
    frame.insert(2, "region", np.repeat(region, T))
    keep = rng.uniform(size=len(frame)) >= p["share_rows_missing"]
    frame = frame[keep].reset_index(drop=True)
    return _round(frame, ("harvest", "irrigation", "frost_days"))


ORCHARDS_MODEL = """\
# Example: invented scenario (fictional fruit cooperatives) with a known
# data-generating process; see robustgmm/demo.py and truth.json.
# Shows: an unbalanced panel with gaps, a base sample filter and sample variants.

[data]
file = "orchards.csv"
unit = "coop"
period = "year"

[model]
outcome = "harvest"
outcome_lags = [1]

[[model.regressors]]
name = "irrigation"
role = "endogenous"

[[model.regressors]]
name = "frost_days"
role = "exogenous"

[method]
equations = "system"
steps = 2

[instruments]
first_lag = 2
last_lag = 3
form = "collapsed"

[sample]                   # the base sample: every region, every year
name = "all regions"

[audit]
focus = ["harvest[t-1]", "irrigation[t]"]

[audit.vary]
equations = ["difference", "system"]

[[audit.vary.sample]]      # drop the highland cooperatives (where irrigation has no effect)
name = "without highland"
exclude = { column = "region", values = ["highland"] }

[[audit.vary.sample]]      # only the later years
name = "from 2013"
period_from = 2013

[[audit.vary.sample]]      # one subgroup per region (each needs 50 cooperatives)
name = "by region"
split = "region"
"""

ORCHARDS = Scenario(
    name="orchards",
    description=("invented example: 300 fictional fruit cooperatives in three regions, "
                 "2010-2019, with gaps; see robustgmm/demo.py"),
    data_name="orchards.csv", model_name="orchards.toml", model_toml=ORCHARDS_MODEL,
    truth=ORCHARDS_TRUTH, process=ORCHARDS_PROCESS,
    roles={"irrigation": "endogenous", "frost_days": "exogenous"},
    simulate=simulate_orchards, seed=5,
    expected={"irrigation[t]": "0.30 outside the highland region, 0 in it; the full-sample "
                               "estimate averages the two"},
)

EXAMPLES = {"clinics": CLINICS, "orchards": ORCHARDS}


def write_examples(root) -> list[Path]:
    """Write every example into ``root/NAME/``; return the model files."""
    return [s.write(Path(root) / name) for name, s in EXAMPLES.items()]


# ---------------------------------------------------------------------------
# running the demo

def write_inputs(folder) -> Path:
    """Write the demo data, model file and truth.json into ``folder``."""
    return DEMO.write(folder)


def _relative_paths(manifest, out: Path):
    """The manifest with paths inside ``out`` written relative to it, so that the
    committed demo output does not carry the path of the machine it was made on."""
    root = out.resolve()

    def fix(value):
        if isinstance(value, dict):
            return {k: fix(v) for k, v in value.items()}
        if isinstance(value, list):
            return [fix(v) for v in value]
        if isinstance(value, str) and ("/" in value or "\\" in value):
            try:
                return Path(value).resolve().relative_to(root).as_posix()
            except (ValueError, OSError):
                return value
        return value
    return fix(dict(manifest))


#: Replications of the demo's small Monte Carlo (the report's section "How these
#: estimators behave at this sample size"). Few, to keep the quick start quick: one
#: replication of the 48 variants costs about half an audit's estimation time
#: (robustgmm bench, workload 5: 0.11 s on an idle core), so 20 add a few seconds. With 20 a coverage rate has a Monte Carlo SE of about 0.05 at
#: 95%; `robustgmm simulate --reps 200` is the real run.
DEMO_REPS = 20
DEMO_SIM_SEED = 1


def run_demo(out_dir=None, *, jobs: int | None = None, reps: int | None = DEMO_REPS) -> Path:
    """Simulate the demo data, audit the demo model, run a small Monte Carlo of its
    grid (``reps`` replications in a world calibrated to the demo data; None: none)
    and write the report.

    ``out_dir`` defaults to ``reports/demo`` under the current directory. The inputs
    (data, model file, truth.json) go into ``out_dir/inputs``; the audit files, the
    simulation files, the report and a copy of ``truth.json`` (which the report reads
    for its "Known truth" section) into ``out_dir``. Returns ``out_dir``."""
    from .audit import audit, write_audit
    from .modelfile import read_model
    from .report import build_report

    out = Path("reports/demo" if out_dir is None else out_dir)
    model_path = write_inputs(out / "inputs")
    spec = read_model(model_path)
    result = audit(spec, jobs=jobs, cache_dir=None, progress=None,
                   **({} if reps is None else {"simulate": reps, "seed": DEMO_SIM_SEED}))
    result = dataclasses.replace(result, manifest=_relative_paths(result.manifest, out))

    def report(stage: Path) -> list[Path]:
        # truth.json beside the audit files (the report's "Known truth" section reads
        # it) and the report itself are published with the audit, so the folder's
        # ownership record lists them like every other file of the audit
        shutil.copyfile(out / "inputs" / TRUTH_NAME, stage / TRUTH_NAME)
        return [stage / TRUTH_NAME] + list(build_report(stage))

    write_audit(result, out, model_file=(Path("inputs") / DEMO.model_name).as_posix(),
                report=report)
    return out


def main(argv=None) -> None:
    """``python -m robustgmm.demo [OUT]`` (the CLI's ``robustgmm demo`` calls run_demo)."""
    import sys
    args = sys.argv[1:] if argv is None else argv
    print(run_demo(args[0] if args else None))


if __name__ == "__main__":
    main()
