"""What the per-term evaluation reads: the evaluated variants and the base model."""
from __future__ import annotations

import math
from dataclasses import asdict, dataclass
from typing import Any, Mapping, Sequence

import numpy as np
import pandas as pd

from ...options import LEVEL_GROUP
from ...options import Effect, Evidence, Verdict
from ..records import (AuditVerdict, BaseEstimate, Driver, Evaluation, Firing, Influence,
                       Rule, TermVerdict, _clean, _num)
from ...spec import Spec, Thresholds


@dataclass
class _Context:
    spec: Spec
    th: Mapping[str, Any]
    alpha: float
    variants: pd.DataFrame
    flags: pd.DataFrame
    estimates: pd.DataFrame
    bounds: pd.DataFrame | None
    base_id: str | None
    base_pos: int | None
    base_ok: bool
    base_acceptable: bool
    statement: str
    judged_ids: set
    ok_ids: set
    settings: list
    evidence: dict
    duplicate_of: dict
    #: rows of influence.csv (None: no dropping analysis)
    influence: pd.DataFrame | None = None
