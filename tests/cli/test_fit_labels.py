"""The fit summary names the standard errors with the one label table
(robustgmm.options.LABELS); it used to print the raw word ``cluster-robust`` for a
one-step robust fit because its own table had keys the core never emits."""
from __future__ import annotations

import pytest

from helpers_toml import dumps_toml
from robustgmm import options
from robustgmm.cli import main
from robustgmm.simulate import simulate_panel


def _model(steps, errors) -> str:
    return dumps_toml({"data": {"file": "panel.csv", "unit": "unit", "period": "period"},
                       "model": {"outcome": "y", "regressors": [{"name": "w"}]},
                       "method": {"steps": steps, "errors": errors},
                       "instruments": {"form": "collapsed", "last_lag": 3}})


@pytest.mark.parametrize("steps, errors, kind", [
    (1, "robust", options.CovarianceKind.CLUSTER_ROBUST),
    (2, "robust", options.CovarianceKind.WINDMEIJER),
    ("iterated", "robust", options.CovarianceKind.WINDMEIJER_ITERATED),
    # two-step: conventional one-step errors are invalid in system GMM (the default
    # equations), an input error (robustgmm.core.invalid_reason)
    (2, "conventional", options.CovarianceKind.CONVENTIONAL),
])
def test_summary_labels_every_kind_the_core_emits(tmp_path, capsys, steps, errors, kind):
    simulate_panel(120, 6, seed=3).to_csv(tmp_path / "panel.csv", index=False)
    (tmp_path / "model.toml").write_text(_model(steps, errors))
    assert main(["fit", str(tmp_path / "model.toml")]) == 0
    out = capsys.readouterr().out
    assert f"(standard errors: {options.LABELS[kind]})" in out
