"""The model file's ``[simulate]`` section: the simulated world of the Monte Carlo
(``robustgmm simulate``, ``audit --simulate``), not what the audit estimates.

``[simulate.truth]`` gives the true value of terms of the model (``"x[t-1]" = 0.3``;
a term not given takes the base model's estimate); ``initial`` is ``"stationary"``
(default) or ``"data"``; ``heteroskedastic = true`` copies the data's
heteroskedasticity across units into the shocks (default false: one shock variance;
:mod:`robustgmm.montecarlo.calibrate`). Nothing here is part of the
:class:`~robustgmm.spec.Spec`: the world never changes the audit's variants, ids or
files. The schema lists the section (so its keys are checked like every other
section's); :func:`check_simulate` checks the values while the model file is read,
:func:`read_simulate` returns them to the command line; that a truth names a term of
the model is checked where the world is built (it needs the spec's terms).
"""
from __future__ import annotations

import math
from dataclasses import dataclass

from ..options import Initial
from .checks import MISSING, key_text


@dataclass(frozen=True)
class SimulateSettings:
    """``[simulate]`` of a model file (None / empty: not given)."""

    truth: tuple[tuple[str, float], ...] = ()
    initial: str | None = None
    heteroskedastic: bool | None = None

    def options(self) -> dict:
        """The keyword arguments of :func:`robustgmm.montecarlo.simulate` given here."""
        out = {}
        if self.truth:
            out["truth"] = dict(self.truth)
        if self.initial is not None:
            out["initial"] = self.initial
        if self.heteroskedastic is not None:
            out["heteroskedastic"] = self.heteroskedastic
        return out


KEYS = ("truth", "initial", "heteroskedastic")


def check_simulate(table: dict, reader) -> SimulateSettings:
    """Check ``[simulate]`` (a parsed table) into ``reader``'s problems; the valid part."""
    truth, initial, hetero = [], None, None
    raw = table.get("truth", MISSING)
    if raw is not MISSING:
        if not isinstance(raw, dict):
            reader.add("[simulate.truth]", "must be a table of term = number "
                       '(e.g. "x[t-1]" = 0.3)', raw, ("simulate", "truth"))
        else:
            for term, value in raw.items():
                ok = isinstance(value, (int, float)) and not isinstance(value, bool) \
                    and math.isfinite(value)
                if not ok:
                    reader.add(f"[simulate.truth] {key_text(term)}",
                               "must be a finite number (the term's true coefficient)",
                               value, ("simulate", "truth", term))
                else:
                    truth.append((str(term), float(value)))
    value = table.get("initial", MISSING)
    if value is not MISSING:
        words = [m.value for m in Initial]
        if value not in words:
            reader.add("[simulate] initial", f"must be one of {', '.join(map(repr, words))}",
                       value, ("simulate", "initial"))
        else:
            initial = str(value)
    value = table.get("heteroskedastic", MISSING)
    if value is not MISSING:
        if not isinstance(value, bool):
            reader.add("[simulate] heteroskedastic", "must be true or false", value,
                       ("simulate", "heteroskedastic"))
        else:
            hetero = value
    return SimulateSettings(truth=tuple(truth), initial=initial, heteroskedastic=hetero)


def read_simulate(path) -> SimulateSettings:
    """The ``[simulate]`` settings of the model file at ``path`` (which
    :func:`robustgmm.modelfile.read_model` has read; a bad value raises its line)."""
    from .schema import read_section
    return read_section(path, "simulate", check_simulate)
