"""The greedy dropping-path figure (issue 16): drawn from influence_path.csv rows."""
from __future__ import annotations

import numpy as np
import pandas as pd
from matplotlib.figure import Figure

from robustgmm.report.figures.dropping_path import plot_dropping_path


def _path(steps: int) -> pd.DataFrame:
    dropped = np.arange(steps + 1)
    return pd.DataFrame({"variant": "base", "term": "x[t]", "target": "sign",
                         "dropped": dropped, "estimate": 0.48 - 0.003 * dropped,
                         "std_error": 0.027, "p_value": 1e-6})


def test_units_dropped_axis_has_whole_numbers_only():
    """The x axis counts units: 20 steps must not be ticked at 2.5, 7.5, ..."""
    fig = Figure()
    ax = fig.add_subplot()
    plot_dropping_path(ax, _path(20), "x[t]", "base", [], 0.05, flip_units=4, noun="bakeries")
    fig.canvas.draw()
    lo, hi = ax.get_xlim()
    ticks = [t for t in ax.get_xticks() if lo <= t <= hi]
    assert len(ticks) >= 3 and all(float(t).is_integer() for t in ticks)
    # the line is the path itself: 21 points, the base estimate at 0 units dropped
    line = [ln for ln in ax.get_lines() if ln.get_label() == "base model (exact refits)"][0]
    assert len(line.get_xdata()) == 21 and line.get_ydata()[0] == 0.48
