"""The audit's figures, drawn with matplotlib's object-oriented API only.

Every plot function takes a matplotlib ``Axes`` (or a ``Figure`` when it needs
several panels), draws into it and returns it; nothing touches pyplot's global
state, so the functions are safe in parallel workers and in notebooks::

    from matplotlib.figure import Figure
    from robustgmm.report import read_audit_folder, figures
    audit = read_audit_folder("audit_out")
    fig = figures.plot_specification_curve(Figure(figsize=(9, 5)), audit, "cash[t-1]")

The four figures:

1. specification curve per focus term (Simonsohn, Simmons & Nelson 2020, Nature
   Human Behaviour 4, 1208-1214): estimates of every estimated variant, sorted, with
   confidence intervals and the base model marked; below, which choices each
   variant makes;
2. Hansen p-value against the number of instruments, grouped by equations and
   instrument form, with the 0.05 rejection line, the 0.25 warning line (common
   practice; Roodman 2009 on proliferation) and the instruments = units line;
3. the autoregressive coefficient of every variant against the band between the
   within (fixed-effects) and pooled OLS estimates (Bond, Hoeffler & Temple 2001;
   Bond 2002);
4. a diagnostics matrix: variants x checks.

Colours are the Okabe-Ito palette (Okabe & Ito 2008, "Color Universal Design"),
distinguishable with the common forms of colour-vision deficiency; marks also differ
in shape so that nothing depends on colour alone.

One module per figure (:mod:`.spec_curve`, :mod:`.hansen_drift`, :mod:`.ar_band`,
:mod:`.diagnostics`), the shared styling in :mod:`.common`, the captions in
:mod:`.captions` and the file rendering in :mod:`.render`.
"""
from __future__ import annotations

from ..labels import SETTING_NAMES, band_arrays, mathtext_safe, setting_name, slug, value_text
from .ar_band import persistence_frame, plot_ar_band, plot_ar_sum
from .captions import CAPTIONS, caption
from .common import MAX_TICK_LABELS
from .diagnostics import (FAIL, NOT_ESTIMATED, PASS, STATE_NAMES, WARN, diagnostics_table,
                          plot_diagnostics_matrix)
from .hansen_drift import plot_hansen_drift
from .render import FigureFile, add_svg_tooltips, draw_figures, render_figures
from .spec_curve import plot_specification_curve

__all__ = ["plot_specification_curve", "plot_hansen_drift", "plot_ar_band", "plot_ar_sum", "persistence_frame",
           "plot_diagnostics_matrix", "diagnostics_table", "render_figures", "draw_figures",
           "add_svg_tooltips", "FigureFile",
           "caption", "CAPTIONS", "MAX_TICK_LABELS", "PASS", "WARN", "FAIL", "NOT_ESTIMATED",
           "STATE_NAMES", "SETTING_NAMES", "band_arrays", "mathtext_safe", "setting_name",
           "slug", "value_text"]
