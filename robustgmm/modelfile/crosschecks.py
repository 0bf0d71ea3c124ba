"""Checks across keys of a model file, run on the spec the reader built.

Each check first asks the reader whether the paths it depends on parsed
(:meth:`~robustgmm.modelfile.schema.Reader.ok`): a key that failed its own check was
replaced by its default, and judging the default would report a problem the user
never wrote (a bad ``period_from`` of a varied sample would make it "the same as the
base sample"), while a bad value elsewhere must not silence an unrelated check (a bad
``[sample] name`` used to hide a misspelt focus term).
"""
from __future__ import annotations

import dataclasses

from ..spec import LONG_RUN, Spec, long_run_label, long_run_labels, term_label, term_labels
from .checks import closest, fmt, key_text
from .schema import RESERVED_NAMES, Reader

_RESERVED = ("the name \"period\" is reserved for period-dummy labels (period[1984]); "
             "rename the column")


def cross_checks(spec: Spec, r: Reader) -> None:
    """Append a problem to ``r`` for every inconsistency between keys of ``spec``."""
    _columns(spec, r)
    _lag_window(spec, r)
    _focus(spec, r)
    _vary(spec, r)
    _labels(spec, r)
    _dropping(spec, r)


def _dropping(spec: Spec, r: Reader) -> None:
    """``few_units_flip`` judges sets of at most ``flip_share`` of the units; the
    search stops at ``max_drop_share``, so the first may not exceed the second."""
    if spec.influence == "none" or not r.ok(("audit", "max_drop_share"),
                                             ("audit", "thresholds", "flip_share")):
        return
    flip = spec.thresholds.flip_share
    if flip > spec.max_drop_share:
        r.add("[audit.thresholds] flip_share",
              f"is above [audit] max_drop_share = {spec.max_drop_share:g}; the search stops "
              "there, so raise max_drop_share or lower flip_share", flip,
              path=("audit", "thresholds", "flip_share"))


def _labels(spec: Spec, r: Reader) -> None:
    """Every ``[labels]`` key must be a term of the model (a period dummy counts)."""
    if not spec.labels or not r.ok(("model",), ("labels",)):
        return
    terms = [label for _, _, label in spec.regressor_terms()] + ["const"]
    # terms that only some variants have (a varied lag structure) can be labelled too
    terms += [term_label(spec.outcome, lag) for lags in spec.vary.outcome_lags for lag in lags]
    terms += [term_label(name, lag) for name, lists in spec.vary.lags
              for lags in lists for lag in lags]
    terms = list(dict.fromkeys(terms))
    for term, _ in spec.labels:
        # the unit column names the units in sentences: bakery = "bakeries"
        if term in terms or term.startswith("period[") or term == spec.unit:
            continue
        hint = closest(term, terms)
        r.add(f"[labels] {key_text(term)}", "is not a term of the model"
              + (f"; did you mean {key_text(hint)}?" if hint else
                 f" (terms: {', '.join(terms)})"), path=("labels", term))


def _columns(spec: Spec, r: Reader) -> None:
    add = r.add
    if spec.unit == spec.period:
        add("[data] period", "is the same column as [data] unit", spec.period)
    for key, col in (("unit", spec.unit), ("period", spec.period)):
        if spec.outcome == col:
            add("[model] outcome", f"is the {key} column; choose the outcome variable",
                spec.outcome)
    if spec.outcome in RESERVED_NAMES:
        add("[model] outcome", _RESERVED, spec.outcome)
    seen: dict[str, int] = {}
    for i, reg in enumerate(spec.regressors, start=1):
        header = f"[[model.regressors]] #{i} ({key_text(reg.name)}) name"
        if reg.name == spec.outcome:
            add(header, "is the outcome; its lags go in [model] outcome_lags", reg.name)
        elif reg.name in (spec.unit, spec.period):
            add(header, "is the unit or period column, not a variable", reg.name)
        elif reg.name in RESERVED_NAMES:
            add(header, _RESERVED, reg.name)
        if reg.name in seen:
            add(header, f"duplicate regressor (also #{seen[reg.name]}); list each "
                "variable once with all its lags", reg.name)
        else:
            seen[reg.name] = i
    model_vars = {spec.outcome, *seen}
    gmm_seen: set = set()
    for i, inst in enumerate(spec.gmm_instruments, start=1):
        header = f"[[instruments.gmm]] #{i} ({key_text(inst.name)}) name"
        if inst.name in model_vars:
            add(header, "is a model variable (its lags are instruments already); list "
                "only columns that are not regressors", inst.name)
        elif inst.name in (spec.unit, spec.period):
            add(header, "is the unit or period column", inst.name)
        elif inst.name in spec.extra_instruments:
            add(header, "is also in [instruments] extra; list it once", inst.name)
        elif inst.name in gmm_seen:
            add(header, "is listed twice", inst.name)
        gmm_seen.add(inst.name)
    for name in spec.extra_instruments:
        if name in model_vars:
            add("[instruments] extra", f"{fmt(name)} is already a model variable; "
                "list only additional instrument columns", list(spec.extra_instruments))
        elif name in (spec.unit, spec.period):
            add("[instruments] extra", f"{fmt(name)} is the unit or period column",
                list(spec.extra_instruments))


_LAGS = (("instruments", "first_lag"), ("instruments", "last_lag"))


def _lag_window(spec: Spec, r: Reader) -> None:
    if spec.last_lag is not None and spec.last_lag < spec.first_lag and r.ok(*_LAGS):
        r.add("[instruments] last_lag", f"is below first_lag = {spec.first_lag}; "
              "the lag window would be empty", spec.last_lag)


def _focus(spec: Spec, r: Reader) -> None:
    # the labels are only known when the outcome lags and the regressors' names and
    # lags parsed (a bad role does not change them)
    if not r.ok(("model", "outcome_lags")) or any(
            p[:2] == ("model", "regressors") and (len(p) == 2 or p[-1] in ("name", "lags"))
            for p in r.bad_paths):
        return
    labels = term_labels(spec)
    for term in spec.focus:
        if term in labels or term in long_run_labels(spec):
            continue
        if term == "const" or term.startswith("period["):
            msg = f"{fmt(term)}: the constant and period dummies cannot be focus terms"
        elif term.endswith(f"[{LONG_RUN}]"):
            names = [reg.name for reg in spec.regressors]
            hint = closest(term[:-len(LONG_RUN) - 2], names)
            msg = (f"{fmt(term)}: a long-run effect needs a regressor of the model, and "
                   f"{fmt(term[:-len(LONG_RUN) - 2])} is not one"
                   + (f" (did you mean {fmt(long_run_label(hint))}?)" if hint else ""))
        else:
            hint = closest(term, labels)
            msg = f"{fmt(term)} is not a term of the model"
            if hint:
                msg += f" (did you mean {fmt(hint)}?)"
        msg += "; terms: " + ", ".join(labels)
        r.add("[audit] focus", msg, list(spec.focus))


def _vary(spec: Spec, r: Reader) -> None:
    add, vary = r.add, spec.vary
    lags_ok = r.ok(*_LAGS, ("audit", "vary", "first_lag"), ("audit", "vary", "last_lag"))
    first_lags = set(vary.first_lag) | {spec.first_lag}
    for value in (vary.last_lag if lags_ok else ()):
        if value is not None and value < min(first_lags):
            add("[audit.vary] last_lag", f"{value} is below every first_lag tried "
                f"({', '.join(map(str, sorted(first_lags)))}); no variant could use it",
                ["all" if v is None else v for v in vary.last_lag])
    if spec.last_lag is not None and lags_ok:
        for value in vary.first_lag:
            if value > spec.last_lag and not any(v is None or v >= value for v in vary.last_lag):
                add("[audit.vary] first_lag", f"{value} is above last_lag = {spec.last_lag} "
                    "and no varied last_lag reaches it; no variant could use it",
                    list(vary.first_lag))
    names = [reg.name for reg in spec.regressors]
    for reg, _roles in vary.roles:
        if reg not in names:
            hint = closest(reg, names)
            add(f"[audit.vary.roles] {key_text(reg)}", "is not a regressor of the model"
                + (f" (did you mean {fmt(hint)}?)" if hint else
                   ("; regressors: " + ", ".join(dict.fromkeys(names)) if names
                    else "; the model has none")))
    for reg, _lists in vary.lags:
        if reg not in names:
            add(f"[audit.vary.lags] {key_text(reg)}", _not_a_regressor(reg, names, spec))
    _drop(spec, r, names)
    _windows(spec, r)
    seen = [spec.sample.name]
    for i, s in enumerate(vary.samples, start=1):
        head = f"[[audit.vary.sample]] #{i} ({key_text(s.name)})"
        if s.name in seen and r.ok(("audit", "vary", "sample", i)):  # a bad key renames it
            add(f"{head} name", "is used by another sample; give each a distinct name", s.name)
        seen.append(s.name)
        # compare restrictions only when both samples were read as written
        if (r.ok(("sample",), ("audit", "vary", "sample", i))
                and dataclasses.replace(s, name=spec.sample.name) == spec.sample):
            add(head, "has the same restrictions as the base sample; it would repeat it")


def _not_a_regressor(name: str, names, spec: Spec) -> str:
    if name == spec.outcome:
        return "is the outcome; its lags are varied with [audit.vary] outcome_lags"
    hint = closest(name, names)
    return "is not a regressor of the model" + (
        f" (did you mean {fmt(hint)}?)" if hint else
        ("; regressors: " + ", ".join(dict.fromkeys(names)) if names else "; the model has none"))


def _drop(spec: Spec, r: Reader, names) -> None:
    """``[audit.vary] drop``: every name a regressor, and never one with a focus term
    (a variant without the term could not judge it)."""
    if not spec.vary.drop or not r.ok(("audit", "vary", "drop")):
        return
    shown = [list(d) for d in spec.vary.drop]
    focus = set(spec.focus)
    for names_dropped in spec.vary.drop:
        for name in names_dropped:
            if name not in names:
                r.add("[audit.vary] drop", f"{fmt(name)} " + _not_a_regressor(name, names, spec),
                      shown)
                continue
            hit = [label for var, _, label in spec.regressor_terms()
                   if var == name and label in focus]
            # the long-run effect is the regressor's too: without it, nothing to judge
            hit += [label for label in (long_run_label(name),) if label in focus]
            if hit:
                r.add("[audit.vary] drop", f"{fmt(name)} holds the focus term "
                      f"{', '.join(hit)}; a focus term cannot be dropped", shown)


def _gmm_style_names(spec: Spec) -> set:
    """Variables whose lagged levels are instruments in some variant: the outcome,
    every regressor whose role (or a role the audit tries) is not exogenous, and the
    external ``[[instruments.gmm]]`` columns."""
    varied = dict(spec.vary.roles)
    out = {spec.outcome, *(g.name for g in spec.gmm_instruments)}
    for reg in spec.regressors:
        if any(role != "exogenous" for role in (reg.role, *varied.get(reg.name, ()))):
            out.add(reg.name)
    return out


def _windows(spec: Spec, r: Reader) -> None:
    """Own instrument windows only for GMM-style variables (an exogenous regressor
    instruments itself), and ``[audit.vary.instrument_lags]`` only for those."""
    gmm = _gmm_style_names(spec)
    for i, reg in enumerate(spec.regressors, start=1):
        for key in ("instrument_lags", "instrument_form"):
            if getattr(reg, key) is not None and reg.name not in gmm:
                r.add(f"[[model.regressors]] #{i} ({key_text(reg.name)}) {key}",
                      f"{reg.name} is exogenous (it instruments itself); an instrument window "
                      "or form applies to endogenous or predetermined regressors")
    names = [reg.name for reg in spec.regressors]
    for name, _windows_tried in spec.vary.instrument_lags:
        where = f"[audit.vary.instrument_lags] {key_text(name)}"
        if name in gmm:
            continue
        if name in names:
            r.add(where, f"{name} is exogenous (it instruments itself); instrument windows "
                  "are varied for the outcome and endogenous or predetermined regressors")
        else:
            options = sorted(gmm)
            hint = closest(name, options)
            r.add(where, "is not the outcome, a GMM-style regressor or a [[instruments.gmm]] "
                  "column" + (f" (did you mean {fmt(hint)}?)" if hint else
                              f"; choose one of {', '.join(options)}"))
