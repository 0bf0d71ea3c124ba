"""The variant grid: expand ``[audit.vary]`` into variant specs and plan them.

Expansion (:func:`expand`) is pure: the grid is the Cartesian product of the values
listed for each varied setting, in the fixed order of :data:`DIMENSIONS` (the last
one varies fastest). The base model is always a variant, listed first and marked
``is_base``, even when a listed value set does not contain its settings. Identical
variants (the same estimation settings) appear once.

Each variant has a stable short id: the first 8 hex digits of the sha256 of its
canonical estimation settings (:func:`canonical_settings`; the sample enters by its
restrictions, not its name). The id does not depend on the grid it sits in, so the
same model gives the same id in every audit; the plan's ``order`` column keeps the
readable order.

Planning (:func:`plan`) looks at the data. A variant is *skipped*, with the reason
stated, only when it cannot be estimated or would repeat another variant exactly:

* ``last_lag < first_lag``: the lag window is empty;
* settings invalid by construction (the core's ``invalid_reason``, the one place
  this rule lives): ``first_lag = 1`` (the level at t−1 is correlated with the
  transformed error) and conventional errors with one-step system GMM (the one-step
  weight is not proportional to the covariance of the stacked errors);
* ``first_lag`` beyond the panel: no period has a level that many periods back
  (a panel of ``P`` periods has lags up to ``P - 1``);
* the model's own lags leave no transformed equation (``max lag + 1 > P - 1``);
* the sample restriction leaves no data;
* fewer instruments than parameters (order condition; the counts are stated);
* a ``last_lag`` that reaches past the deepest lag the panel has gives exactly the
  estimation of ``last_lag = "all"`` (a level lagged ``P`` or more periods does not
  exist on a ``P``-period calendar; see :func:`reaches_past_panel`): when such a
  twin is in the grid the later one is skipped as a duplicate of the earlier
  (``duplicate_of`` names it), so nothing is estimated twice.

With counts (``robustgmm audit --plan``), variants that differ only in ``last_lag``
and have the same number of instruments have the same instrument set (the windows
are nested): the later one gets ``duplicate_of`` (:func:`same_instrument_sets`).

When the core cannot build a variant's design for a reason that is a property of the
data (no observations left, a regressor without variation in the sample), the
variant stays planned with the reason noted ("expected to fail: ...") and the
runner records it as *failed*, like any other estimation failure.

Everything else is estimable and is *planned*, even when a setting makes no
difference on these data (e.g. collapsed vs per-period with two periods): the audit
shows that it made no difference rather than hiding the variant. Settings that are
unusual but well defined (conventional errors with iterated weighting, or with
one-step difference GMM) are not impossible either.

Instrument and parameter counts come from the core before any estimation
(:func:`design_counts`; the plan that ``robustgmm audit --plan`` prints).
"""
from __future__ import annotations

import dataclasses
import hashlib
import itertools
import json
import math
from dataclasses import dataclass
from typing import Any, Callable, Mapping, Sequence

import pandas as pd

from ..errors import EstimationError, InputError, UnderidentifiedError
from ..spec import SampleFilter, Spec, canonical_settings, sample_restrictions  # noqa: F401 (re-exported)

#: Varied settings in grid order (the last varies fastest). The lag structure comes
#: first: ``outcome_lags``, one dimension per regressor whose lags are varied
#: (column ``lags:NAME``) and the regressors left out (``drop``). Roles and samples
#: are handled specially: one dimension per regressor whose role is varied
#: (column ``role:NAME``) and one for the sample (column ``sample``). A column
#: exists only when its key is in ``[audit.vary]``, so adding a dimension never
#: changes the columns (or ids) of a grid that does not use it.
DIMENSIONS = ("outcome_lags", "lags", "drop", "equations", "transform", "steps", "errors",
              "form", "first_lag", "last_lag", "time_effects", "instrument_lags", "roles",
              "samples")
#: the dimensions that replace one Spec field by a listed value
SCALAR_DIMENSIONS = ("equations", "transform", "steps", "errors", "form", "first_lag",
                     "last_lag", "time_effects")

ID_LENGTH = 8
PLANNED, SKIPPED = "planned", "skipped"


# ---------------------------------------------------------------------------
# canonical settings and ids
# ---------------------------------------------------------------------------
def sample_key(sample: SampleFilter) -> str:
    """A string that identifies a sample by its restrictions (for grouping)."""
    return json.dumps(sample_restrictions(sample), sort_keys=True, default=str)


def canonical_json(obj: Any) -> str:
    """Deterministic JSON text (sorted keys, no whitespace) for hashing."""
    return json.dumps(obj, sort_keys=True, separators=(",", ":"), default=str)


def settings_hash(spec: Spec) -> str:
    return hashlib.sha256(canonical_json(canonical_settings(spec)).encode()).hexdigest()


# ---------------------------------------------------------------------------
# variants
# ---------------------------------------------------------------------------
@dataclass(frozen=True)
class Variant:
    """One variant of the audit.

    ``settings``: (column, display value) of every varied setting, in column order.
    ``status``: ``planned`` or ``skipped`` (after :func:`plan`); ``reason`` says why a
    variant is skipped. ``instruments``/``units``/``observations`` are filled by
    :func:`plan` (``None`` when the design could not be built).
    """

    id: str
    order: int
    spec: Spec
    settings: tuple[tuple[str, Any], ...]
    is_base: bool = False
    status: str = PLANNED
    reason: str = ""
    instruments: int | None = None
    parameters: int | None = None
    units: int | None = None
    observations: int | None = None
    #: id of an earlier variant with the same estimation (plan-time duplicates:
    #: a deeper last_lag that adds no instrument), else ""
    duplicate_of: str = ""

    def settings_dict(self) -> dict:
        return dict(self.settings)


def _display(value: Any) -> Any:
    return "all" if value is None else value


def _dimensions(spec: Spec) -> list[tuple[str, list[Any], Callable[[dict, Any], None]]]:
    """(column, values, apply) for every varied setting, in :data:`DIMENSIONS` order.

    ``apply(changes, value)`` records the replacement of one setting into ``changes``
    (a dict of Spec field → value, plus per-regressor role changes under "_roles").
    """
    vary = spec.vary
    dims = []

    def scalar(field):
        def apply(changes, value):
            changes[field] = value
        return apply

    def per_name(key, name):
        # settings held per variable (lags, instrument windows, roles) are collected
        # under one key and applied together by _apply
        def apply(changes, value):
            changes.setdefault(key, {})[name] = value
        return apply

    names = [r.name for r in spec.regressors]

    def known(where, name):
        if name not in names:
            raise InputError(f"{spec.source}: {where} {name} is not a regressor "
                             f"of the model (regressors: {', '.join(names) or 'none'})")

    if vary.outcome_lags:
        dims.append(("outcome_lags", list(vary.outcome_lags), scalar("outcome_lags")))
    for name, lists in vary.lags:
        known("[audit.vary.lags]", name)

        dims.append((f"lags:{name}", list(lists), per_name("_lags", name)))
    if vary.drop:
        for dropped in vary.drop:
            for name in dropped:
                known("[audit.vary] drop:", name)

        def apply_drop(changes, value):
            changes["_drop"] = value
        dims.append(("drop", list(vary.drop), apply_drop))
    for field in SCALAR_DIMENSIONS:
        values = list(getattr(vary, field))
        if values:
            dims.append((field, values, scalar(field)))
    for name, windows in vary.instrument_lags:
        if name != spec.outcome and name not in [g.name for g in spec.gmm_instruments]:
            known("[audit.vary.instrument_lags]", name)

        dims.append((f"instrument_lags:{name}", list(windows), per_name("_windows", name)))
    for name, roles in vary.roles:
        known("[audit.vary.roles]", name)

        dims.append((f"role:{name}", list(roles), per_name("_roles", name)))
    if vary.samples:
        samples = [spec.sample] + [s for s in vary.samples]

        def apply_sample(changes, value):
            changes["sample"] = value
        dims.append(("sample", samples, apply_sample))
    return dims


def _apply(spec: Spec, changes: dict) -> Spec:
    """The variant spec: the recorded changes applied to the base spec (roles and lags
    per regressor, then the regressors left out, then the instrument windows).

    A window equal to the one the variable gets from the global settings is stored
    as no own window, and an exogenous regressor keeps none (it instruments itself),
    so that the same estimation always has the same settings (and id)."""
    changes = dict(changes)
    roles = changes.pop("_roles", None) or {}
    lags = changes.pop("_lags", None) or {}
    drop = set(changes.pop("_drop", ()) or ())
    windows = changes.pop("_windows", None) or {}
    if roles or lags or drop:
        changes["regressors"] = tuple(
            dataclasses.replace(r, role=roles.get(r.name, r.role), lags=lags.get(r.name, r.lags))
            for r in spec.regressors if r.name not in drop)
    out = dataclasses.replace(spec, **changes)
    if windows or roles:
        out = _with_windows(out, windows)
    return out


def default_window(spec: Spec, role: str) -> tuple[int, int | None]:
    """The window a GMM-style variable gets from the global ``[instruments]`` settings
    (predetermined regressors one lag sooner; see the core's design)."""
    if role == "predetermined":
        last = None if spec.last_lag is None else max(spec.last_lag - 1, 1)
        return (max(spec.first_lag - 1, 1), last)
    return (spec.first_lag, spec.last_lag)


def _with_windows(spec: Spec, windows: Mapping[str, Any]) -> Spec:
    def own(window, role):
        return None if window is None or window == default_window(spec, role) else window

    regs = []
    for r in spec.regressors:
        window = windows.get(r.name, r.instrument_lags)
        regs.append(dataclasses.replace(
            r, instrument_lags=None if r.role == "exogenous" else own(window, r.role)))
    gmm = tuple(dataclasses.replace(g, lags=own(windows.get(g.name, g.lags), "external"))
                for g in spec.gmm_instruments)
    return dataclasses.replace(
        spec, regressors=tuple(regs), gmm_instruments=gmm,
        outcome_instrument_lags=own(windows.get(spec.outcome, spec.outcome_instrument_lags),
                                    "outcome"))


def window_of(spec: Spec, name: str) -> tuple[int, int | None] | None:
    """The instrument window variable ``name`` has in ``spec`` (its own, else the
    global one), or None when it is not GMM-style there (exogenous or dropped)."""
    if name == spec.outcome:
        return spec.outcome_instrument_lags or default_window(spec, "outcome")
    for g in spec.gmm_instruments:
        if g.name == name:
            return g.lags or default_window(spec, "external")
    for r in spec.regressors:
        if r.name == name:
            if r.role == "exogenous":
                return None
            return r.instrument_lags or default_window(spec, r.role)
    return None


def _base_value(spec: Spec, column: str) -> Any:
    if column.startswith("role:"):
        name = column[len("role:"):]
        return next(r.role for r in spec.regressors if r.name == name)
    if column.startswith("lags:"):
        name = column[len("lags:"):]
        return next(r.lags for r in spec.regressors if r.name == name)
    if column == "drop":
        return ()
    if column.startswith("instrument_lags:"):
        return window_of(spec, column[len("instrument_lags:"):])
    if column == "sample":
        return spec.sample
    return getattr(spec, column)


def _shown(column: str, value: Any) -> Any:
    """The value as variants.csv shows it: as the model file writes it (lag lists
    ``[1, 2]``, the regressors left out ``["married"]``, ``[]`` for none)."""
    if column == "sample":
        return value.name
    if column in ("outcome_lags", "drop") or column.startswith("lags:"):
        from ..modelfile.checks import fmt
        return fmt(list(value), limit=10_000)
    if column.startswith("instrument_lags:"):
        from ..modelfile.checks import window_text
        return "none" if value is None else window_text(value)
    return _display(value)


def expand(spec: Spec) -> list[Variant]:
    """All variants of ``spec`` (base first, then the product grid), deduplicated.

    Static skips (those that need no data) are applied here: settings invalid by
    construction and ``last_lag < first_lag``.
    """
    dims = _dimensions(spec)
    columns = [c for c, _, _ in dims]
    candidates: list[tuple[Spec, tuple, bool]] = []
    base_settings = tuple((c, _shown(c, _base_value(spec, c))) for c in columns)
    candidates.append((spec, base_settings, True))
    for combo in itertools.product(*[values for _, values, _ in dims]):
        changes: dict = {}
        for (_, _, apply), value in zip(dims, combo):
            apply(changes, value)
        variant_spec = _apply(spec, changes)
        shown = tuple((c, _shown(c, v)) for c, v in zip(columns, combo))
        candidates.append((variant_spec, shown, False))

    seen: dict[str, int] = {}
    unique: list[tuple[Spec, tuple, bool, str]] = []
    for vspec, shown, is_base in candidates:
        digest = settings_hash(vspec)
        # the same estimation written two ways (a base whose own window equals the
        # global one, beside a grid member where _apply stored it as no own window) is
        # one variant: compare the normalised settings; the id stays the written one's
        same = settings_hash(_with_windows(vspec, {}))
        if same in seen:
            continue  # identical estimation settings: the earlier one stands (base first)
        seen[same] = len(unique)
        unique.append((vspec, shown, is_base, digest))

    length = ID_LENGTH
    while len({d[:length] for *_, d in unique}) < len(unique):
        length += 4  # a prefix collision: lengthen every id (deterministically)
    variants = []
    for order, (vspec, shown, is_base, digest) in enumerate(unique, start=1):
        status, reason = PLANNED, ""
        invalid = _core().invalid_reason(vspec)
        if invalid:
            status, reason = SKIPPED, invalid
        elif vspec.last_lag is not None and vspec.last_lag < vspec.first_lag:
            status = SKIPPED
            reason = (f"last_lag = {vspec.last_lag} is below first_lag = {vspec.first_lag}: "
                      "the instrument lag window is empty")
        variants.append(Variant(id=digest[:length], order=order, spec=vspec,
                                settings=shown, is_base=is_base, status=status, reason=reason))
    return variants


def setting_columns(spec: Spec) -> list[str]:
    """The varied-setting columns of the grid, in order."""
    return [c for c, _, _ in _dimensions(spec)]


# ---------------------------------------------------------------------------
# panels per sample
# ---------------------------------------------------------------------------
def samples_of(spec: Spec) -> list[SampleFilter]:
    """The distinct samples of the audit: the base sample, then the varied ones."""
    out, keys = [], set()
    for sample in (spec.sample, *spec.vary.samples):
        key = sample_key(sample)
        if key not in keys:
            keys.add(key)
            out.append(sample)
    return out


def read_for_splits(spec: Spec):
    """The data frame when ``spec`` has a ``split`` sample (read once, for the split
    and then for every sample's panel), else None."""
    if not any(s.split is not None for s in spec.vary.samples):
        return None
    from .. import data
    return data.read_frame(spec)


def resolve_splits(spec: Spec, frame=None) -> Spec:
    """``spec`` with every ``split`` sample of ``[[audit.vary.sample]]`` replaced by one
    subgroup per value of the split column (``keep = {column, values = [value]}``,
    named ``"NAME: column = value"``, in sorted value order), so that the grid stays
    a pure expansion. The column must be constant within each unit (a subgroup is a
    set of units); otherwise, or when it is missing, the one-line error names the key.
    ``frame``: the data (read from the model's data file when not given)."""
    if not any(s.split is not None for s in spec.vary.samples):
        return spec
    from .. import data

    if frame is None:
        frame = data.read_frame(spec)
    out: list[SampleFilter] = []
    for i, s in enumerate(spec.vary.samples, start=1):
        if s.split is None:
            out.append(s)
            continue
        col = s.split
        where = f"{spec.source}: [[audit.vary.sample]] #{i} ({s.name}) split = {col!r}"
        if col not in frame.columns:
            raise InputError(f"{where}: no such column in the data")
        if s.keep_column is not None:
            raise InputError(f"{where}: give split or keep in one sample, not both")
        sub = frame[[spec.unit, col]].dropna()
        per_unit = sub.groupby(spec.unit, sort=True)[col].nunique()
        varying = per_unit[per_unit > 1]
        if len(varying):
            raise InputError(f"{where}: the column varies within units (unit "
                             f"{varying.index[0]} has {int(varying.iloc[0])} values); split "
                             "needs a column that is constant within each unit")
        values = sorted({_plain(v) for v in sub[col]}, key=lambda v: (isinstance(v, str), v))
        for v in values:
            out.append(dataclasses.replace(s, name=f"{s.name}: {col} = {v}", split=None,
                                           keep_column=col, keep_values=(v,)))
    return dataclasses.replace(spec, vary=dataclasses.replace(spec.vary, samples=tuple(out)))


def _plain(value: Any) -> Any:
    """A data value as a plain Python scalar (whole floats as ints), so that the
    subgroup's settings hash the same however the column was stored."""
    value = value.item() if hasattr(value, "item") else value
    if isinstance(value, float) and value.is_integer():
        return int(value)
    return value


def subgroup_too_small(sample: SampleFilter, panel) -> str:
    """The reason a varied subgroup is skipped ('' when it is large enough): fewer
    than ``min_units`` units (default 50; common practice for a GMM sample, whose
    clustered weight matrix needs many more units than instruments)."""
    if sample.keep_column is None or panel.n_units >= sample.min_units:
        return ""
    return (f"sample {sample.name!r} has {panel.n_units} units, fewer than min_units = "
            f"{sample.min_units}")


def load_panels(spec: Spec, panel=None, frame=None) -> dict[str, Any]:
    """``sample_key -> Panel`` for every sample of the audit, each built once.

    ``panel``, when given, is the panel of the base sample; ``frame``, when given,
    the data as :func:`robustgmm.data.read_frame` reads them (else they are read). A sample that leaves no
    data maps to the one-line reason (a string) instead of a panel, so that its
    variants are skipped with that reason rather than stopping the audit.
    Problems with the data file itself (missing file, bad columns) are raised as
    :class:`InputError` by the data layer.
    """
    from .. import data

    panels: dict[str, Any] = {}
    for sample in samples_of(spec):
        key = sample_key(sample)
        if panel is not None and key == sample_key(spec.sample):
            panels[key] = panel
            continue
        if frame is None:
            frame = data.read_frame(spec)  # read once, filtered per sample below
        try:
            panels[key] = data.build_panel(frame, spec, sample=sample)
        except InputError as exc:
            if key == sample_key(spec.sample):
                raise  # the base sample must exist: that is bad input, not a variant
            panels[key] = f"sample {sample.name!r}: " + "; ".join(exc.problems)
            continue
        if key != sample_key(spec.sample):
            panels[key] = subgroup_too_small(sample, panels[key]) or panels[key]
    return panels


# ---------------------------------------------------------------------------
# planning on the data
# ---------------------------------------------------------------------------
def _core():
    from .. import core
    return core


def design_counts(spec: Spec, panel) -> tuple[int, int]:
    """(instruments, parameters) of a variant on its panel, before estimation.

    :func:`robustgmm.core.design_counts`. Raises :class:`EstimationError` when the
    design cannot be built, including the order condition (fewer instruments than
    parameters), whose message states both counts.
    """
    return _core().design_counts(spec, panel)


def reaches_past_panel(spec: Spec, n_periods: int) -> bool:
    """Whether ``last_lag`` gives exactly the ``"all"`` window on ``n_periods`` periods.

    A level lagged ``n_periods`` or more does not exist on the calendar, so a window
    ending there is the full window. Predetermined regressors use the window one
    lag sooner (``last_lag - 1``), so with them ``last_lag = n_periods - 1`` still
    differs from "all"; without them it is the same.
    """
    if spec.last_lag is None:
        return False
    has_predetermined = any(r.role == "predetermined" for r in spec.regressors)
    deepest = n_periods if has_predetermined else n_periods - 1
    return spec.last_lag >= deepest


def _panel_checks(spec: Spec, panel) -> str:
    """Reason a variant is impossible on this panel ('' when it is not)."""
    P = panel.n_periods
    where = f"the {spec.sample.name} has {P} period{'s' if P != 1 else ''}"
    max_lag = spec.max_lag()
    if max_lag + 1 > P - 1:
        return (f"the model's longest lag ({max_lag}) leaves no transformed equation: "
                f"{where}")
    if spec.first_lag > P - 1:
        return (f"first_lag = {spec.first_lag} reaches past the panel: {where}, "
                f"so the deepest lag is {P - 1}")
    return ""


def plan(spec: Spec, panels: Mapping[str, Any], variants: Sequence[Variant] | None = None,
         *, counts: bool = True) -> list[Variant]:
    """Check every variant on its sample's panel and count its instruments.

    Returns the variants (same order) with status and reason, and, with
    ``counts=True``, instruments, parameters, units and observations from the
    core's design (one pass over the data per variant). ``counts=False`` does the
    cheap checks only; :func:`robustgmm.audit.audit` uses it because estimation
    reports the same counts (and the order condition) anyway.
    """
    core = _core()
    variants = list(expand(spec) if variants is None else variants)
    out: list[Variant] = []
    effective: dict[str, str] = {}  # effective-settings hash -> id of the first variant
    for v in variants:
        if v.status == SKIPPED:
            out.append(v)
            continue
        panel = panels[sample_key(v.spec.sample)]
        if isinstance(panel, str):
            out.append(dataclasses.replace(v, status=SKIPPED, reason=panel))
            continue
        reason = _panel_checks(v.spec, panel)
        if reason:
            out.append(dataclasses.replace(v, status=SKIPPED, reason=reason))
            continue
        # a window reaching past the deepest lag is the "all" window
        eff_spec = v.spec
        if reaches_past_panel(v.spec, panel.n_periods):
            eff_spec = dataclasses.replace(v.spec, last_lag=None)
        key = settings_hash(eff_spec)
        twin = effective.get(key)
        if twin is not None and not v.is_base:
            out.append(dataclasses.replace(
                v, status=SKIPPED, duplicate_of=twin,
                reason=f"same estimation as variant {twin}: last_lag = {v.spec.last_lag} "
                       f"reaches past the deepest lag of the {v.spec.sample.name} "
                       f"({panel.n_periods} periods), which makes it last_lag = all"))
            continue
        effective.setdefault(key, v.id)
        out.append(_with_counts(v, panel) if counts else v)
    return same_instrument_sets(out) if counts else out


def same_instrument_sets(variants: Sequence[Variant]) -> list[Variant]:
    """Mark variants whose instrument set equals an earlier variant's (``duplicate_of``).

    Variants that differ only in ``last_lag`` have nested instrument sets (a deeper
    window adds columns, never removes one; the estimation sample does not depend on
    the window), so equal instrument counts mean identical sets and identical
    estimates: the deeper window reaches past every lag the data have. They stay
    planned (the audit estimates them in the same family at almost no cost and
    merges them after); the plan shows the twin."""
    first: dict[tuple, Variant] = {}
    out = []
    for v in variants:
        if v.status != PLANNED or v.instruments is None or v.duplicate_of:
            out.append(v)
            continue
        key = (settings_hash(dataclasses.replace(v.spec, last_lag=None)), v.instruments)
        twin = first.get(key)
        if twin is None:
            first[key] = v
            out.append(v)
        else:
            out.append(dataclasses.replace(v, duplicate_of=twin.id))
    return out


def _with_counts(v: Variant, panel) -> Variant:
    core = _core()
    try:
        n_instr, n_par = design_counts(v.spec, panel)
        mask = core.estimation_sample(v.spec, panel)
    except EstimationError as exc:
        message = _one_line(exc)
        if is_underidentified(type(exc).__name__):
            # the order condition: an impossible combination, skipped with its counts
            return dataclasses.replace(v, status=SKIPPED, reason=message)
        # a property of the data (no observations left, no variation): the variant
        # stays planned and the runner records it as failed
        return dataclasses.replace(v, reason=f"expected to fail: {message}")
    filled = dataclasses.replace(v, instruments=n_instr, parameters=n_par,
                                 units=int(mask.any(axis=1).sum()), observations=int(mask.sum()))
    if n_instr < n_par:  # the core raises first; kept for other counters
        return dataclasses.replace(
            filled, status=SKIPPED,
            reason=f"fewer instruments ({n_instr}) than parameters ({n_par}): "
                   "the model is not identified")
    return filled


def is_underidentified(error_type: str) -> bool:
    """Whether a failure's exception type is :class:`UnderidentifiedError` itself (the
    order condition fails, or too few observations): the variant is an impossible
    combination, shown as skipped. Its subclass ``RankConditionError`` (a term no
    instrument moves, which only the data show) is a failed variant. Decided by type,
    never by message."""
    return error_type == UnderidentifiedError.__name__


def _one_line(exc: BaseException) -> str:
    text = " ".join(str(exc).split())
    return text or type(exc).__name__


def plan_table(spec: Spec, variants: Sequence[Variant]) -> pd.DataFrame:
    """The plan as a table: id, order, base flag, varied settings, status, reason,
    instruments, parameters, units, instruments per unit."""
    columns = setting_columns(spec)
    rows = []
    for v in variants:
        row = {"variant": v.id, "order": v.order, "is_base": v.is_base}
        row.update(v.settings_dict())
        ipu = (v.instruments / v.units) if (v.instruments is not None and v.units) else None
        row.update({"status": v.status, "reason": v.reason, "instruments": v.instruments,
                    "parameters": v.parameters, "units": v.units,
                    "instruments_per_unit": ipu, "duplicate_of": v.duplicate_of})
        rows.append(row)
    frame = pd.DataFrame(rows, columns=["variant", "order", "is_base", *columns, "status",
                                        "reason", "instruments", "parameters", "units",
                                        "instruments_per_unit", "duplicate_of"])
    for col in ("instruments", "parameters", "units"):
        frame[col] = frame[col].astype("Int64")
    frame["instruments_per_unit"] = frame["instruments_per_unit"].astype(float)
    return frame


def check_base(spec: Spec) -> None:
    """The base model must be valid by construction (the core's ``invalid_reason``):
    otherwise the audit is bad input, one line naming the model file (a varied value
    with the same problem is only a skipped variant)."""
    reason = _core().invalid_reason(spec)
    if reason:
        raise InputError(f"{spec.source}: the base model: {reason}")


def size_bound(spec: Spec) -> int:
    """At most this many variants: the base plus the product of the varied lists
    (:func:`expand` removes repeats, so the grid can be smaller). Instant."""
    return 1 + math.prod(len(values) for _, values, _ in _dimensions(spec))


def check_size(spec: Spec, cap: int | None = None) -> int | None:
    """Check the grid of ``spec`` against ``[audit] max_variants`` (or ``cap`` when the
    model sets none): above it the audit is bad input, one line naming the key and
    the count. Returns the exact count (from :func:`expand`: no data, no estimate)
    when the bound :func:`size_bound` exceeds the cap, otherwise None (within it)."""
    limit = spec.max_variants if spec.max_variants is not None else cap
    if limit is None or size_bound(spec) <= limit:
        return None
    n = len(expand(spec))
    if spec.max_variants is not None and n > spec.max_variants:
        raise InputError(f"{spec.source}: [audit.vary] makes {n:,} variants, more than "
                         f"[audit] max_variants = {spec.max_variants:,}: vary fewer "
                         "settings or raise max_variants")
    return n


def plan_frame(spec: Spec, panel=None) -> pd.DataFrame:
    """Plan the audit of ``spec`` without estimating (``robustgmm audit --plan``).

    Loads the data when ``panel`` (the base sample's panel) is not given.
    """
    check_base(spec)
    frame = read_for_splits(spec)
    spec = resolve_splits(spec, frame)
    check_size(spec)
    panels = load_panels(spec, panel, frame=frame)
    return plan_table(spec, plan(spec, panels))
