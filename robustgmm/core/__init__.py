"""The estimation core: difference and system GMM for one model on one panel.

It knows nothing of files or audits: it takes a :class:`robustgmm.spec.Spec` and a
:class:`robustgmm.data.Panel` and returns a :class:`FitResult`.

Modules, one job each: ``design`` (rows, regressors, instrument columns, chunk
arrays), ``moments`` (batched sums over units), ``engine`` (chunked passes within a
memory budget), ``problem`` (identification, moment sums, GMM estimators),
``covariance`` (variance estimators by (steps, errors)), ``diagnostics``
(AR(m), Sargan, Hansen, difference-in-Hansen), ``family`` (the fit and shared
work), ``results`` (the immutable result record), ``linalg`` (small rescaled
factorisations).
"""
from __future__ import annotations

import numpy as np

from ..data import Panel
from ..spec import Spec
from .design import Design
from .dropping import DropResult, Search as DropSearch, smallest_sets
from .family import ALL_PARTS, Parts, fit, fit_family, invalid_reason, share_key
from .problem import GMMProblem
from .influence import UnitSums, unit_sums
from .results import Counts, FitResult, TermEstimate, TestResult

# what the other layers use (the audit's grid, runner and bounds; the CLI); the
# design and the moment problem are internals, imported from their modules
__all__ = ["fit", "fit_family", "Parts", "ALL_PARTS", "share_key", "invalid_reason", "count_instruments",
           "design_counts", "estimation_sample", "FitResult", "TermEstimate", "TestResult",
           "Counts", "unit_sums", "UnitSums", "DropSearch", "DropResult", "smallest_sets"]


def design_counts(spec: Spec, panel: Panel) -> tuple[int, int]:
    """(instruments, parameters) the model uses on this panel, before estimating:
    the instrument columns left after dropping empty ones, redundant time moments
    and the instruments of dropped period dummies, and the coefficients left after
    dropping those dummies. Raises :class:`~robustgmm.errors.EstimationError` when
    the design cannot be built (including the order condition). Costs about one
    first-moment pass."""
    problem = GMMProblem(spec, panel)
    return int(problem.L), int(problem.K)


def count_instruments(spec: Spec, panel: Panel) -> int:
    """Number of instrument columns the model uses on this panel (see
    :func:`design_counts`)."""
    return design_counts(spec, panel)[0]


def estimation_sample(spec: Spec, panel: Panel) -> np.ndarray:
    """(N, P) boolean mask of the level observations that enter the estimation."""
    return Design(spec, panel).sample_mask.copy()
