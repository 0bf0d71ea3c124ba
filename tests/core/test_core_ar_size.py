"""Size of the AR(2) test in every kind of variant an audit tries (issue 12).

Under the null of no second-order serial correlation of the differenced errors the
Arellano & Bond (1991, eq. (8)-(9)) statistic m2 is asymptotically standard normal,
whichever consistent GMM estimator supplies the residuals: one- or two-step,
difference or system, first differences or forward orthogonal deviations (the test
is always on the first-differenced residuals), per-period or collapsed instruments,
any lag window. The process of :mod:`robustgmm.simulate` is correctly specified for
every variant below (x endogenous and treated so, w exogenous, mean-stationary, so
all instruments are valid; no time effects in the process, so including them is
valid too), and serially uncorrelated shocks make m2's null true.

An earlier audit-level count (20 data sets of 400 units x 10 periods, the 32 variants
below with time effects) found 14.8% of variants rejecting at 5%. The variants of one
data set share it, so their statistics move together: that count is about three data
sets in twenty, not 95 independent rejections. This test counts per variant type over
independent data sets.

Tolerance: the binomial 3-sigma band around 5% for the number of replications
(``ROBUSTGMM_MC_REPS``, default 200); the mean of m2 within 4 Monte Carlo errors of 0
and its standard deviation within 4 Monte Carlo errors (``1/sqrt(2 reps)``) of 1.
"""
from __future__ import annotations

import itertools
import os

import numpy as np
import pytest

from helpers_core import sim_panel, sim_spec
from robustgmm.core import fit_family
from robustgmm.simulate import PanelProcess

PROCESS = PanelProcess(rho=0.5, beta=1.0, gamma=0.5, theta=0.4)
DIMENSIONS = dict(equations=["difference", "system"], transform=["fd", "fod"], steps=[1, 2],
                  form=["per-period", "collapsed"], last_lag=[3, None])


def _reps(default):
    return int(os.environ.get("ROBUSTGMM_MC_REPS", default))


@pytest.mark.slow
@pytest.mark.parametrize("time_effects", [False, True])
def test_ar2_has_nominal_size_in_every_variant_type(time_effects):
    reps = _reps(200)
    combos = list(itertools.product(*DIMENSIONS.values()))
    specs = [sim_spec(time_effects=time_effects, **dict(zip(DIMENSIONS, c))) for c in combos]
    z = np.full((reps, len(specs)), np.nan)
    p = np.full((reps, len(specs)), np.nan)
    for r in range(reps):
        _, panel = sim_panel(200, 7, seed=31000 + r, process=PROCESS)
        for j, res in enumerate(fit_family(specs, panel)):
            assert not isinstance(res, Exception), (combos[j], res)
            z[r, j], p[r, j] = res.tests["ar2"].statistic, res.tests["ar2"].p_value
    assert np.isfinite(z).all()
    band = 3 * np.sqrt(0.05 * 0.95 / reps)
    rates = (p < 0.05).mean(axis=0)
    bad = {str(dict(zip(DIMENSIONS, c))): round(float(rate), 3)
           for c, rate in zip(combos, rates) if abs(rate - 0.05) > band}
    assert not bad, (f"AR(2) rejection at 5% outside 5% ± {band:.3f}", bad)
    assert abs((p < 0.05).mean() - 0.05) <= band  # all variant types together
    assert np.all(np.abs(z.mean(axis=0)) <= 4 * z.std(axis=0) / np.sqrt(reps))
    # the sample standard deviation of n normal draws has standard error about
    # sigma / sqrt(2n): within four of them of 1
    spread = 4 / np.sqrt(2 * reps)
    assert np.all(np.abs(z.std(axis=0) - 1) <= spread), z.std(axis=0)
