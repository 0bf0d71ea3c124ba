"""The estimation core: difference and system GMM for one model on one panel.

It knows nothing of files or audits: it takes a :class:`robustgmm.spec.Spec` and a
:class:`robustgmm.data.Panel` and returns a :class:`FitResult`.
"""
from __future__ import annotations

import numpy as np

from ..data import Panel
from ..spec import Spec
from .design import Design
from .estimator import GMMProblem, fit, fit_family, share_key
from .results import Counts, FitResult, TermEstimate, TestResult

__all__ = ["fit", "fit_family", "share_key", "count_instruments", "estimation_sample", "FitResult", "TermEstimate",
           "TestResult", "Counts", "Design", "GMMProblem"]


def count_instruments(spec: Spec, panel: Panel) -> int:
    """Number of instrument columns the model uses on this panel (after dropping
    empty columns and the instruments of collinear period dummies)."""
    return GMMProblem(spec, panel).L


def estimation_sample(spec: Spec, panel: Panel) -> np.ndarray:
    """(N, P) boolean mask of the level observations that enter the estimation."""
    return Design(spec, panel).sample_mask.copy()
