"""The model specification: one frozen, flat object per model (and per variant).

A variant of an audit is ``dataclasses.replace(spec, **settings)``, which is why the
fields are flat rather than nested by model-file section. Reading the model file
lives in :mod:`robustgmm.modelfile`; this module holds the data types and the label
conventions that every other layer shares.

Every type here checks itself on construction (``__post_init__``) with the checks
the model-file reader uses (:mod:`robustgmm.modelfile.checks`), so
``Spec(form="colapsed")`` raises the same one-line :class:`~robustgmm.errors.InputError`
as ``form = "colapsed"`` in a model file, and no misspelt option reaches the core.

The option fields hold the *words* of the vocabulary (the values of the enums of
:mod:`robustgmm.options`: ``"system"``, ``"fd"``, ``2``, ``"iterated"``, ...), not
enum members: a member given by the caller is stored as its word. A spec is then
plain data, written to JSON and CSV as it is, and its canonical settings (hence the
variant ids) never depend on how it was built. ``options.parse(Steps, spec.steps)``
gives the member where a member is wanted; the string enums compare equal to their
words, so ``spec.equations == Equations.SYSTEM`` holds either way.
"""
from __future__ import annotations

import dataclasses
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any, Callable, Mapping

from .errors import InputError


def _validate(obj, checks: Mapping[str, Callable]) -> None:
    """Run ``check`` on each named field of a frozen dataclass, store the parsed value
    and raise one :class:`InputError` listing every field that fails."""
    from .modelfile import checks as c  # the checks import nothing from this module

    source = getattr(obj, "source", "<dict>")
    owner = type(obj).__name__ if source == "<dict>" else f"{source}: {type(obj).__name__}"
    problems = []
    for name, check in checks.items():
        value = getattr(obj, name)
        try:
            parsed = check(value)
        except c.Bad as bad:
            problems.append(f"{owner} {name} = {c.fmt(value)}: {bad}")
            continue
        if parsed is not value:
            object.__setattr__(obj, name, parsed)
    if problems:
        raise InputError(problems)


def _seq(check: Callable) -> Callable:
    """A list check that also takes a tuple (the model file gives lists, code tuples)."""
    return lambda v: check(list(v) if isinstance(v, tuple) else v)


def _optional(check: Callable) -> Callable:
    return lambda v: None if v is None else check(v)


def _instance(kind: type, what: str) -> Callable:
    def check(v):
        from .modelfile.checks import Bad
        if not isinstance(v, kind):
            raise Bad(f"must be {what}")
        return v
    return check


def _tuple_of(kind: type, what: str) -> Callable:
    def check(v):
        from .modelfile.checks import Bad
        if not isinstance(v, (tuple, list)) or not all(isinstance(x, kind) for x in v):
            raise Bad(f"must be a tuple of {what}")
        return tuple(v)
    return check


def _each(check: Callable) -> Callable:
    """A tuple of values each passing ``check`` (the values an audit tries)."""
    def run(v):
        from .modelfile.checks import Bad, fmt
        if not isinstance(v, (tuple, list)):
            raise Bad("must be a tuple of values to try")
        out = []
        for item in v:
            try:
                out.append(check(item))
            except Bad as bad:
                raise Bad(f"{fmt(item)} is not valid: {bad}") from None
        return tuple(out)
    return run


@dataclass(frozen=True)
class Regressor:
    """A regressor with the lags that enter the model and its role.

    Roles follow Arellano & Bond (1991) and Arellano & Bover (1995): an *endogenous*
    regressor is correlated with the current shock (levels lagged ``first_lag`` and
    more are valid instruments), a *predetermined* one only with past shocks
    (lags ``first_lag - 1`` and more), an *exogenous* one with no shock (it
    instruments itself).
    """

    name: str
    lags: tuple[int, ...] = (0,)
    role: str = "exogenous"
    #: its own instrument window ``(first, last)`` (``last`` None = "all") and form,
    #: used as given instead of the global ``[instruments]`` ones (None: the global
    #: ones, with the predetermined shift); endogenous and predetermined only
    instrument_lags: tuple[int, int | None] | None = None
    instrument_form: str | None = None

    def __post_init__(self):
        from .modelfile import checks as c
        _validate(self, {"name": c.v_name, "lags": _seq(c.v_lags(0, "0 is the current period")),
                         "role": c.v_role, "instrument_lags": _optional(c.v_window),
                         "instrument_form": _optional(c.v_form)})


@dataclass(frozen=True)
class GmmInstrument:
    """An external GMM-style instrument (``[[instruments.gmm]]``): lagged levels of a
    column that is not a regressor, in the transformed equation (lags ``first ..
    last``), and in system GMM its difference dated ``first - 1`` in the level
    equation, like the model's own GMM-style variables. ``lags``/``form`` None: the
    global ``[instruments]`` window and form."""

    name: str
    lags: tuple[int, int | None] | None = None
    form: str | None = None

    def __post_init__(self):
        from .modelfile import checks as c
        _validate(self, {"name": c.v_name, "lags": _optional(c.v_window),
                         "form": _optional(c.v_form)})


@dataclass(frozen=True)
class SampleFilter:
    """A structured sample restriction: nothing in it is evaluated.

    Keeps periods in ``[period_from, period_to]``, drops every unit that has any
    row whose ``exclude_column`` value is in ``exclude_values``, and keeps only the
    units whose observed ``keep_column`` values are all in ``keep_values`` (a
    subgroup). ``split`` (only in ``[[audit.vary.sample]]``) names a column that is
    constant within units: the audit replaces the sample by one subgroup per value
    (:func:`robustgmm.audit.grid.resolve_splits`). A varied subgroup with fewer than
    ``min_units`` units is skipped with that reason (``min_units`` changes no
    estimate, so it is not part of the variant id).
    """

    name: str = "full sample"
    period_from: int | None = None
    period_to: int | None = None
    exclude_column: str | None = None
    exclude_values: tuple[Any, ...] = ()
    keep_column: str | None = None
    keep_values: tuple[Any, ...] = ()
    split: str | None = None
    min_units: int = 50

    def __post_init__(self):
        from .modelfile import checks as c
        values = lambda v: () if len(v) == 0 else _seq(c.v_scalar_list)(v)  # noqa: E731
        _validate(self, {"name": c.v_name, "period_from": _optional(c.v_period),
                         "period_to": _optional(c.v_period),
                         "exclude_column": _optional(c.v_name), "exclude_values": values,
                         "keep_column": _optional(c.v_name), "keep_values": values,
                         "split": _optional(c.v_name), "min_units": c.v_min_units})

    @property
    def is_full(self) -> bool:
        return (self.period_from is None and self.period_to is None
                and self.exclude_column is None and self.keep_column is None
                and self.split is None)

    @property
    def columns(self) -> tuple[str, ...]:
        """The data columns the filter reads (exclude, keep, split)."""
        return tuple(c for c in (self.exclude_column, self.keep_column, self.split)
                     if c is not None)


@dataclass(frozen=True)
class Vary:
    """Values to try for each varied setting (``[audit.vary]``); empty = not varied.

    ``roles`` maps a regressor name to the roles to try; ``samples`` lists extra
    sample filters (the base sample is always included). ``outcome_lags`` lists lag
    lists of the outcome to try (``[[1], [1, 2]]``), ``lags`` maps a regressor name
    to the lag lists to try (``[0]``, ``[0, 1]``), and ``drop`` lists sets of
    regressors to leave out (``[[], ["married"]]``); a variant without a term simply
    does not estimate it.
    """

    equations: tuple[str, ...] = ()
    transform: tuple[str, ...] = ()
    steps: tuple[Any, ...] = ()
    form: tuple[str, ...] = ()
    first_lag: tuple[int, ...] = ()
    last_lag: tuple[int | None, ...] = ()
    time_effects: tuple[bool, ...] = ()
    errors: tuple[str, ...] = ()
    roles: tuple[tuple[str, tuple[str, ...]], ...] = ()
    samples: tuple[SampleFilter, ...] = ()
    outcome_lags: tuple[tuple[int, ...], ...] = ()
    lags: tuple[tuple[str, tuple[tuple[int, ...], ...]], ...] = ()
    drop: tuple[tuple[str, ...], ...] = ()
    #: per GMM-style variable (the outcome or a regressor): instrument windows to try
    instrument_lags: tuple[tuple[str, tuple[tuple[int, int | None], ...]], ...] = ()

    def __post_init__(self):
        from .modelfile import checks as c
        _validate(self, {
            "equations": _each(c.v_equations), "transform": _each(c.v_transform),
            "steps": _each(c.v_steps), "form": _each(c.v_form),
            "first_lag": _each(c.v_first_lag), "last_lag": _each(_optional(c.v_last_lag)),
            "time_effects": _each(c.v_bool), "errors": _each(c.v_errors),
            "roles": _each(_role_pair), "samples": _tuple_of(SampleFilter, "SampleFilter"),
            "outcome_lags": _each(_seq(c.v_lags(1, "a dynamic model needs at least one lag "
                                                "of the outcome, e.g. [1]"))),
            "lags": _each(_lags_pair), "drop": _each(_seq(c.v_drop_list)),
            "instrument_lags": _each(_window_pair),
        })

    def is_empty(self) -> bool:
        return not any(getattr(self, f) for f in self.__dataclass_fields__)


@dataclass(frozen=True)
class Thresholds:
    """Verdict thresholds (``[audit.thresholds]``); each default is documented in
    :mod:`robustgmm.audit.verdicts` beside the rule that uses it, with its source."""

    hansen_reject: float = 0.05
    hansen_too_high: float = 0.25
    ar2_reject: float = 0.05
    difference_hansen_reject: float = 0.05
    instruments_per_unit: float = 1.0
    spread_in_se: float = 2.0
    significant_share: float = 0.9
    #: a variant whose standard error exceeds this many base standard errors is
    #: uninformative: listed, but left out of ``spread`` and ``significance_flip``
    uninformative_se_ratio: float = 3.0
    #: ``hansen_p_high`` fires only from this many instruments per unit on
    instruments_per_unit_warn: float = 0.25
    #: count untestable variants (exactly identified) as evidence
    count_untestable: bool = False
    #: ``weak_instruments`` fires below this conditional F (Staiger & Stock 1997's
    #: rule of thumb; common practice)
    weak_f: float = 10.0
    #: ``unreliable_at_this_size`` (a Monte Carlo of the grid): simulated coverage of
    #: the 1 - alpha intervals below this ...
    min_coverage: float = 0.85
    #: ... or |mean bias| above this many simulation standard deviations
    max_bias_sd: float = 0.5
    #: ``few_units_flip`` fires when dropping at most this share of the units reverses
    #: the sign or the significance of a base conclusion (a robustgmm default; the
    #: order of magnitude follows Broderick, Giordano & Meager 2020, where dropping
    #: under 1% of the sample overturns published results)
    flip_share: float = 0.01

    def __post_init__(self):
        from .modelfile import checks as c
        _validate(self, {f.name: c.threshold_check(f.name) for f in dataclasses.fields(self)})


@dataclass(frozen=True)
class Spec:
    """One dynamic panel model; see DEVELOPERS.md for the model-file keys."""

    unit: str
    period: str
    outcome: str
    data_file: Path | None = None
    outcome_lags: tuple[int, ...] = (1,)
    regressors: tuple[Regressor, ...] = ()
    time_effects: bool = True
    equations: str = "system"
    transform: str = "fd"
    steps: int | str = 2
    errors: str = "robust"
    first_lag: int = 2
    last_lag: int | None = None
    form: str = "per-period"
    extra_instruments: tuple[str, ...] = ()
    #: the outcome's own instrument window and form (``[model] instrument_lags``,
    #: ``instrument_form``); None: the global ``[instruments]`` ones
    outcome_instrument_lags: tuple[int, int | None] | None = None
    outcome_instrument_form: str | None = None
    #: external GMM-style instruments (``[[instruments.gmm]]``)
    gmm_instruments: tuple[GmmInstrument, ...] = ()
    sample: SampleFilter = field(default_factory=SampleFilter)
    focus: tuple[str, ...] = ()
    alpha: float = 0.05
    #: The most variants the audit may run (``[audit] max_variants``; None: no cap
    #: of the model's own, the command line asks for ``--yes`` above 5,000). A run
    #: control, not part of :func:`canonical_settings`.
    max_variants: int | None = None
    #: Which models the dropping-units analysis covers (``[audit] influence``:
    #: "base", "all" acceptable variants too, "none") and the largest share of units
    #: a search may drop (``[audit] max_drop_share``); run controls, not part of
    #: :func:`canonical_settings`.
    influence: str = "base"
    max_drop_share: float = 0.05
    vary: Vary = field(default_factory=Vary)
    thresholds: Thresholds = field(default_factory=Thresholds)
    #: Display labels of terms for every document (``[labels] "x[t]" = "Leverage"``)
    #: and significance stars in table.tex (``[report] stars``); display only, so not
    #: part of :func:`canonical_settings`.
    labels: tuple[tuple[str, str], ...] = ()
    stars: bool = False
    source: str = "<dict>"

    def __post_init__(self):
        from .modelfile import checks as c
        _validate(self, {
            "labels": c.v_labels, "stars": c.v_bool,
            "unit": c.v_name, "period": c.v_name, "outcome": c.v_name,
            "data_file": _optional(lambda v: Path(v) if isinstance(v, str) else
                                   _instance(Path, "a path or None")(v)),
            "outcome_lags": _seq(c.v_lags(1, "a dynamic model needs at least one lag "
                                             "of the outcome, e.g. [1]")),
            "regressors": _tuple_of(Regressor, "Regressor"),
            "time_effects": c.v_bool,
            "equations": c.v_equations, "transform": c.v_transform, "steps": c.v_steps,
            "errors": c.v_errors, "first_lag": c.v_first_lag,
            "last_lag": _optional(c.v_last_lag), "form": c.v_form,
            "extra_instruments": _seq(c.v_name_list),
            "outcome_instrument_lags": _optional(c.v_window),
            "outcome_instrument_form": _optional(c.v_form),
            "gmm_instruments": _tuple_of(GmmInstrument, "GmmInstrument"),
            "sample": _instance(SampleFilter, "a SampleFilter"),
            "focus": _seq(c.v_name_list), "alpha": c.v_prob,
            "max_variants": _optional(c.v_max_variants),
            "influence": c.v_influence, "max_drop_share": c.v_max_drop_share,
            "vary": _instance(Vary, "a Vary"),
            "thresholds": _instance(Thresholds, "a Thresholds"),
            "source": _instance(str, "a text (the model file, for messages)"),
        })

    # -- derived names -------------------------------------------------------
    def used_columns(self) -> tuple[str, ...]:
        """Data columns the model needs (outcome, regressors, extra instruments)."""
        seen: dict[str, None] = {self.outcome: None}
        for reg in self.regressors:
            seen[reg.name] = None
        for name in self.extra_instruments:
            seen[name] = None
        for inst in self.gmm_instruments:
            seen[inst.name] = None
        return tuple(seen)

    def regressor_terms(self) -> tuple[tuple[str, int, str], ...]:
        """(variable, lag, label) for every non-deterministic regressor, in order."""
        out = [(self.outcome, lag, term_label(self.outcome, lag)) for lag in self.outcome_lags]
        for reg in self.regressors:
            out.extend((reg.name, lag, term_label(reg.name, lag)) for lag in reg.lags)
        return tuple(out)

    def ar_terms(self) -> tuple[str, ...]:
        """Labels of the autoregressive coefficients (lags of the outcome)."""
        return tuple(term_label(self.outcome, lag) for lag in self.outcome_lags)

    def focus_terms(self) -> tuple[str, ...]:
        """The terms the audit judges: ``focus``, else every regressor term of the
        base model except those of regressors that ``[audit.vary] drop`` leaves out
        (a focus term is never dropped)."""
        if self.focus:
            return self.focus
        dropped = {name for names in self.vary.drop for name in names}
        return tuple(label for var, _, label in self.regressor_terms() if var not in dropped)

    def to_dict(self) -> dict:
        """The model-file dict of this spec (see :func:`robustgmm.modelfile.spec_to_dict`)."""
        from .modelfile import spec_to_dict  # modelfile imports this module
        return spec_to_dict(self)

    def max_lag(self) -> int:
        lags = list(self.outcome_lags)
        for reg in self.regressors:
            lags.extend(reg.lags)
        return max(lags) if lags else 0


def _role_pair(v):
    """One ``(regressor, roles to try)`` pair of :attr:`Vary.roles`."""
    from .modelfile import checks as c
    if not (isinstance(v, (tuple, list)) and len(v) == 2):
        raise c.Bad("must be a (regressor name, roles) pair")
    return (c.v_name(v[0]), _each(c.v_role)(v[1]))


def _lags_pair(v):
    """One ``(regressor, lag lists to try)`` pair of :attr:`Vary.lags`."""
    from .modelfile import checks as c
    if not (isinstance(v, (tuple, list)) and len(v) == 2):
        raise c.Bad("must be a (regressor name, lag lists) pair")
    return (c.v_name(v[0]), _each(_seq(c.v_lags(0, "0 is the current period")))(v[1]))


def _window_pair(v):
    """One ``(variable, windows to try)`` pair of :attr:`Vary.instrument_lags`."""
    from .modelfile import checks as c
    if not (isinstance(v, (tuple, list)) and len(v) == 2):
        raise c.Bad("must be a (variable name, windows) pair")
    return (c.v_name(v[0]), _each(c.v_window)(v[1]))


def term_label(name: str, lag: int) -> str:
    """``NAME[t]`` for lag 0, ``NAME[t-l]`` for lag l (the term labels of every output, docs/formats.md)."""
    return f"{name}[t]" if lag == 0 else f"{name}[t-{lag}]"


LONG_RUN = "long-run"


def long_run_label(name: str) -> str:
    """``NAME[long-run]``: the long-run effect of regressor ``NAME`` (its coefficients'
    sum over one minus the sum of the autoregressive coefficients, :mod:`robustgmm.core.longrun`)."""
    return f"{name}[{LONG_RUN}]"


def long_run_labels(spec: "Spec") -> tuple[str, ...]:
    """The long-run labels of the model's regressors, in order."""
    return tuple(dict.fromkeys(long_run_label(reg.name) for reg in spec.regressors))


def period_label(period: int) -> str:
    return f"period[{int(period)}]"


CONST_LABEL = "const"


def term_labels(spec: Spec) -> tuple[str, ...]:
    return tuple(label for _, _, label in spec.regressor_terms())


def is_deterministic_label(label: str) -> bool:
    return label == CONST_LABEL or label.startswith("period[")


def sample_restrictions(sample: SampleFilter) -> dict:
    """The restrictions of a sample filter, without its display name. ``keep`` and
    ``split`` enter only when set, so the ids of samples without them never move."""
    out = {
        "period_from": sample.period_from,
        "period_to": sample.period_to,
        "exclude_column": sample.exclude_column,
        "exclude_values": list(sample.exclude_values),
    }
    if sample.keep_column is not None:
        out["keep_column"] = sample.keep_column
        out["keep_values"] = list(sample.keep_values)
    if sample.split is not None:
        out["split"] = sample.split
    return out


def canonical_settings(spec: Spec) -> dict:
    """Every setting that changes an estimate, as plain JSON values.

    Display-only fields (source, focus, alpha, thresholds, vary, the data file path,
    the sample's name) are left out, so the same model gives the same variant id,
    cache key and share group whatever it is called.
    """
    out = {
        "outcome": spec.outcome,
        "outcome_lags": list(spec.outcome_lags),
        "regressors": [_regressor_settings(r) for r in spec.regressors],
        "time_effects": bool(spec.time_effects),
        "equations": spec.equations,
        "transform": spec.transform,
        "steps": spec.steps,
        "errors": spec.errors,
        "first_lag": spec.first_lag,
        "last_lag": "all" if spec.last_lag is None else spec.last_lag,
        "form": spec.form,
        "extra_instruments": list(spec.extra_instruments),
        "sample": sample_restrictions(spec.sample),
    }
    # per-variable windows and external GMM-style instruments enter only when set, so
    # the ids of models without them never move
    own = _window_settings(spec.outcome_instrument_lags, spec.outcome_instrument_form)
    if own:
        out["outcome_instruments"] = own
    if spec.gmm_instruments:
        out["gmm_instruments"] = [[g.name, _window_settings(g.lags, g.form)]
                                  for g in spec.gmm_instruments]
    return out


def _window_settings(lags, form) -> dict:
    out: dict = {}
    if lags is not None:
        out["lags"] = [lags[0], "all" if lags[1] is None else lags[1]]
    if form is not None:
        out["form"] = form
    return out


def _regressor_settings(r: Regressor) -> list:
    own = _window_settings(r.instrument_lags, r.instrument_form)
    return [r.name, list(r.lags), r.role] + ([own] if own else [])


def settings_of(spec: Spec) -> Mapping[str, Any]:
    """The estimation settings as plain values (for results and manifests)."""
    canonical = canonical_settings(spec)
    out = {key: canonical[key] for key in ("equations", "transform", "steps", "errors",
                                          "first_lag", "last_lag", "form", "time_effects")}
    out["roles"] = {reg.name: reg.role for reg in spec.regressors}
    out["sample"] = spec.sample.name
    return out
