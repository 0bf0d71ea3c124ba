"""The model-file schema as one table, and the reader that follows it.

:data:`SCHEMA` maps the full path of every key (``("instruments", "form")``) to the
:class:`~robustgmm.spec.Spec` field it fills, the check of its value
(:mod:`robustgmm.modelfile.checks`) and its default. Arrays of tables
(``[[model.regressors]]``, ``[[audit.vary.sample]]``) and the inline ``exclude``
table have their own small tables (:data:`REGRESSOR`, :data:`SAMPLE`,
:data:`EXCLUDE`). The section and key lists used for unknown-key messages are derived
from these tables, so a key is added in one place.

:class:`Reader` records the outcome of every path it reads (:meth:`Reader.ok`), so
that a cross-check (:mod:`robustgmm.modelfile.crosschecks`) can ask whether the
paths it depends on parsed, and a bad value elsewhere never hides or invents a
problem.
"""
from __future__ import annotations

import dataclasses
from dataclasses import dataclass
from pathlib import Path
from typing import Any, Callable

from ..errors import InputError
from ..options import DATA_EXTENSIONS
from ..spec import GmmInstrument, Regressor, SampleFilter, Spec, Thresholds, Vary
from .checks import (MISSING, Bad, closest, fmt, key_text, threshold_check, v_bool,
                     v_equations, v_errors, v_first_lag, v_form, v_lags, v_last_lag, v_name,
                     v_drop_list, v_influence, v_labels, v_max_drop_share, v_max_variants,
                     v_min_units, v_window, v_name_list,
                     v_period, v_prob, v_role, v_scalar_list, v_steps, v_transform)

Path_ = tuple  # a key path: ("method", "steps"), ("model", "regressors", 2, "role"), ...


def v_file(v):
    if not isinstance(v, str) or not v.strip():
        raise Bad("must be a file name in quotes, e.g. \"panel.csv\"")
    suffix = Path(v).suffix.lower()
    if suffix not in DATA_EXTENSIONS:
        raise Bad(f"unsupported file type {suffix or '(no extension)'!s}: use "
                  + ", ".join(DATA_EXTENSIONS))
    return v


@dataclass(frozen=True)
class Key:
    """One model-file key: the Spec field it fills (or the field of the record its
    table builds), the check of its value, its default and whether it is required."""

    field: str
    check: Callable[[Any], Any]
    default: Any = MISSING
    required: bool = False


#: Tables that hold more than scalar keys: the reader handles them in their own step.
TABLE = object()

SCHEMA: dict[Path_, Key | object] = {
    ("data", "unit"): Key("unit", v_name, required=True),
    ("data", "period"): Key("period", v_name, required=True),
    ("data", "file"): Key("data_file", v_file),
    ("model", "outcome"): Key("outcome", v_name, required=True),
    ("model", "outcome_lags"): Key("outcome_lags", v_lags(
        1, "a dynamic model needs at least one lag of the outcome, e.g. [1]")),
    ("model", "time_effects"): Key("time_effects", v_bool),
    ("model", "instrument_lags"): Key("outcome_instrument_lags", v_window),
    ("model", "instrument_form"): Key("outcome_instrument_form", v_form),
    ("model", "regressors"): TABLE,
    ("method", "equations"): Key("equations", v_equations),
    ("method", "transform"): Key("transform", v_transform),
    ("method", "steps"): Key("steps", v_steps),
    ("method", "errors"): Key("errors", v_errors),
    ("instruments", "first_lag"): Key("first_lag", v_first_lag),
    ("instruments", "last_lag"): Key("last_lag", v_last_lag),
    ("instruments", "form"): Key("form", v_form),
    ("instruments", "extra"): Key("extra_instruments", v_name_list),
    ("instruments", "gmm"): TABLE,
    ("sample", "name"): TABLE, ("sample", "period_from"): TABLE,
    ("sample", "period_to"): TABLE, ("sample", "exclude"): TABLE,
    ("sample", "keep"): TABLE, ("sample", "split"): TABLE, ("sample", "min_units"): TABLE,
    ("audit", "focus"): Key("focus", v_name_list),
    ("audit", "alpha"): Key("alpha", v_prob),
    ("audit", "max_variants"): Key("max_variants", v_max_variants),
    ("audit", "influence"): Key("influence", v_influence),
    ("audit", "max_drop_share"): Key("max_drop_share", v_max_drop_share),
    ("audit", "vary"): TABLE,
    ("audit", "thresholds"): TABLE,
    # [labels]: free keys, one per term of the model ("x[t]" = "Leverage")
    ("labels", "*"): TABLE,
    ("report", "stars"): Key("stars", v_bool),
    # [run]: where to run, not what to estimate; read and checked by modelfile/run.py
    ("run", "scheduler"): TABLE,
    # [simulate]: the Monte Carlo's world, not what to estimate; modelfile/simulate.py
    ("simulate", "truth"): TABLE, ("simulate", "initial"): TABLE,
    ("simulate", "heteroskedastic"): TABLE,
}

#: ``[[model.regressors]]`` keys → :class:`~robustgmm.spec.Regressor` fields.
REGRESSOR = {
    "name": Key("name", v_name, required=True),
    "lags": Key("lags", v_lags(0, "0 is the current period"), default=(0,)),
    "role": Key("role", v_role, default="exogenous"),
    "instrument_lags": Key("instrument_lags", v_window, default=None),
    "instrument_form": Key("instrument_form", v_form, default=None),
}
#: ``[[instruments.gmm]]`` keys → :class:`~robustgmm.spec.GmmInstrument` fields.
GMM_INSTRUMENT = {
    "name": Key("name", v_name, required=True),
    "lags": Key("lags", v_window, default=None),
    "form": Key("form", v_form, default=None),
}
#: ``[sample]`` / ``[[audit.vary.sample]]`` keys → :class:`~robustgmm.spec.SampleFilter`.
SAMPLE = {
    "name": Key("name", v_name),
    "period_from": Key("period_from", v_period, default=None),
    "period_to": Key("period_to", v_period, default=None),
    "exclude": TABLE,
    "keep": TABLE,
    "split": Key("split", v_name, default=None),
    "min_units": Key("min_units", v_min_units, default=50),
}
EXCLUDE = {
    "column": Key("exclude_column", v_name, default=None, required=True),
    "values": Key("exclude_values", v_scalar_list, default=(), required=True),
}
#: ``keep = {column, values}``: a subgroup (the units whose values are all listed).
KEEP = {
    "column": Key("keep_column", v_name, default=None, required=True),
    "values": Key("keep_values", v_scalar_list, default=(), required=True),
}
#: ``[audit.vary]`` keys → :class:`~robustgmm.spec.Vary` fields (each a list of values
#: of the model-file key with the same check); ``roles`` and ``sample`` are tables.
VARY = {
    "equations": Key("equations", v_equations), "transform": Key("transform", v_transform),
    "steps": Key("steps", v_steps), "form": Key("form", v_form),
    "first_lag": Key("first_lag", v_first_lag), "last_lag": Key("last_lag", v_last_lag),
    "time_effects": Key("time_effects", v_bool), "errors": Key("errors", v_errors),
    "outcome_lags": Key("outcome_lags", v_lags(
        1, "a dynamic model needs at least one lag of the outcome, e.g. [1]")),
    "drop": Key("drop", v_drop_list),
    "roles": TABLE, "lags": TABLE, "instrument_lags": TABLE, "sample": TABLE,
}
#: The ``[audit.vary]`` tables held per variable (``{variable: list of values}``) →
#: the check of each value; each fills the :class:`~robustgmm.spec.Vary` field of its
#: name with ``(variable, values)`` pairs.
VARY_PER_NAME = {"roles": v_role, "lags": v_lags(0, "0 is the current period"),
                 "instrument_lags": v_window}
#: ``[audit.thresholds]`` keys → :class:`~robustgmm.spec.Thresholds` fields.
THRESHOLDS = {f.name: Key(f.name, threshold_check(f.name)) for f in dataclasses.fields(Thresholds)}

#: Valid keys per section, in schema order (for unknown-key messages).
SECTIONS: dict[str, tuple[str, ...]] = {}
for _section, _key in SCHEMA:
    SECTIONS.setdefault(_section, ())
    SECTIONS[_section] += (_key,)
VARY_KEYS = tuple(VARY)
#: Label prefix reserved for period dummies (``period[1984]``); a variable with this
#: name would make its terms look like dummies.
RESERVED_NAMES = ("period",)


def _printable(value) -> str:
    """``value`` as text with control characters written as escapes, so a generated
    name never holds a character the name check refuses."""
    return "".join(c if c.isprintable() else c.encode("unicode_escape").decode("ascii")
                   for c in str(value))


def describe_sample(pf, pt, column, values, keep_column=None, keep_values=(),
                    split=None) -> str:
    """The display name of an unnamed sample."""
    parts = []
    if pf is not None and pt is not None:
        parts.append(f"periods {pf}-{pt}")
    elif pf is not None:
        parts.append(f"periods from {pf}")
    elif pt is not None:
        parts.append(f"periods to {pt}")
    if column is not None:
        parts.append(f"excluding {_printable(column)} in {{{', '.join(map(_printable, values))}}}")
    if keep_column is not None:
        parts.append(f"{_printable(keep_column)} in {{{', '.join(map(_printable, keep_values))}}}")
    if split is not None:
        parts.append(f"by {_printable(split)}")
    return ", ".join(parts) if parts else "full sample"


class Reader:
    """Reads a model-file dict along the schema, collecting one line per problem."""

    def __init__(self, source: str):
        self.source = source
        self.problems: list[str] = []
        self._bad: set[Path_] = set()  # paths whose values failed their check

    # -- outcomes --------------------------------------------------------------
    @property
    def bad_paths(self) -> frozenset:
        """The paths whose values failed their check (or, required, were missing)."""
        return frozenset(self._bad)

    def ok(self, *prefixes: Path_) -> bool:
        """True when no path under any of ``prefixes`` failed its check."""
        return not any(p[:len(pre)] == pre for p in self._bad for pre in prefixes)

    def add(self, where: str, message: str, value: Any = MISSING, path: Path_ | None = None) -> None:
        shown = "" if value is MISSING else f" = {fmt(value)}"
        self.problems.append(f"{self.source}: {where}{shown}: {message}")
        if path is not None:
            self._bad.add(path)

    def unknown_keys(self, table: dict, allowed, where: str, header: str) -> None:
        """Report keys of ``table`` not in ``allowed``; ``header`` is the table shown
        in messages ("[method]") and ``where`` its dotted name ("method")."""
        for key in table:
            if key in allowed:
                continue
            home = [sec for sec, keys in SECTIONS.items() if key in keys and sec != where]
            hint = closest(key, allowed)
            if home:  # a valid key in the wrong table: say where it goes
                msg = f"unknown key here; it belongs in [{home[0]}]"
            elif hint is not None:
                msg = f"unknown key (did you mean {fmt(hint)}?)"
            else:
                msg = "unknown key; valid keys: " + ", ".join(allowed)
            prefix = f"{header} " if header else ""
            self.problems.append(f"{self.source}: {prefix}{key_text(key)}: {msg}")

    def table(self, parent: dict, key: str, header: str, path: Path_) -> dict:
        value = parent.get(key, {})
        if not isinstance(value, dict):
            self.add(header, "must be a table (a [section] with keys)", value, path)
            return {}
        return value

    def get(self, table: dict, key: str, spec: Key, header: str, path: Path_) -> Any:
        """The checked value of ``table[key]`` (its default when missing or bad)."""
        if key not in table:
            if spec.required:
                self.add(f"{header} {key}", "is missing (required)", path=path)
            return spec.default
        value = table[key]
        try:
            return spec.check(value)
        except Bad as bad:
            self.add(f"{header} {key}", str(bad), value, path)
            return spec.default

    def fields(self, table: dict, keys: dict, header: str, path: Path_) -> dict:
        """Spec fields from the scalar keys of one table (``keys``: name → Key)."""
        out = {}
        for name, spec in keys.items():
            if spec is TABLE:
                continue
            got = self.get(table, name, spec, header, path + (name,))
            if got is not MISSING:
                out[spec.field] = got
        return out

    # -- the model -------------------------------------------------------------
    def read(self, d: Any, base_dir) -> Spec | None:
        if not isinstance(d, dict):
            self.add("model", "must be a table of sections ([data], [model], ...)")
            return None
        self._unknown_sections(d)
        fields: dict[str, Any] = {"source": self.source}
        for section in SECTIONS:  # in schema order, so problems are listed in file order
            if section == "sample":
                if "sample" in d:
                    table = self.table(d, "sample", "[sample]", ("sample",))
                    fields["sample"] = self.sample(table, "[sample]", "sample", ("sample",))
                continue
            if section == "labels":
                if "labels" in d:
                    table = self.table(d, "labels", "[labels]", ("labels",))
                    good = []
                    for term, text in table.items():  # one line per bad label
                        try:
                            good += v_labels([(term, text)])
                        except Bad as bad:
                            self.add(f"[labels] {key_text(term)}",
                                     str(bad).replace(f"{term!r} ", ""), text,
                                     ("labels", term))
                    fields["labels"] = tuple(good)
                continue
            table = self.table(d, section, f"[{section}]", (section,))
            self.unknown_keys(table, SECTIONS[section], section, f"[{section}]")
            keys = {k: v for (s, k), v in SCHEMA.items() if s == section}
            fields.update(self.fields(table, keys, f"[{section}]", (section,)))
            if section == "model":
                regressors = self.regressors(table.get("regressors", MISSING))
                if regressors is not MISSING:
                    fields["regressors"] = regressors
            elif section == "instruments" and "gmm" in table:
                got = self.gmm_instruments(table["gmm"])
                if got is not MISSING:
                    fields["gmm_instruments"] = got
            elif section == "audit":
                self.audit_tables(table, fields)
            elif section == "run":
                from .run import check_run
                check_run(table, self)
            elif section == "simulate":
                from .simulate import check_simulate
                check_simulate(table, self)
        if "data_file" in fields:
            file = fields["data_file"]
            fields["data_file"] = Path(file) if base_dir is None else Path(base_dir) / file
        if any(k not in fields for k in ("unit", "period", "outcome")):
            return None
        return Spec(**fields)

    def audit_tables(self, audit: dict, fields: dict) -> None:
        if "thresholds" in audit:
            path = ("audit", "thresholds")
            table = self.table(audit, "thresholds", "[audit.thresholds]", path)
            self.unknown_keys(table, tuple(THRESHOLDS), "audit.thresholds", "[audit.thresholds]")
            fields["thresholds"] = Thresholds(**self.fields(table, THRESHOLDS,
                                                            "[audit.thresholds]", path))
        if "vary" in audit:
            fields["vary"] = self.vary(self.table(audit, "vary", "[audit.vary]", ("audit", "vary")))

    def _unknown_sections(self, d: dict) -> None:
        for key, value in d.items():
            if key in SECTIONS:
                continue
            hint = closest(key, SECTIONS)
            home = [sec for sec, keys in SECTIONS.items() if key in keys]
            if hint is not None:
                msg = f"unknown section (did you mean [{hint}]?)"
            elif home:
                msg = f"unknown top-level key; it belongs in [{home[0]}]"
            else:
                msg = "unknown section; valid sections: " + ", ".join(f"[{s}]" for s in SECTIONS)
            self.problems.append(f"{self.source}: [{key_text(key)}]: {msg}"
                                 if isinstance(value, dict)
                                 else f"{self.source}: {key_text(key)}: {msg}")

    def regressors(self, value) -> Any:
        path = ("model", "regressors")
        if value is MISSING:
            return MISSING
        if not isinstance(value, list) or not all(isinstance(r, dict) for r in value):
            self.add("[model] regressors",
                     "must be a list of [[model.regressors]] tables with name, lags and role",
                     value, path)
            return MISSING
        return self.named_tables(value, "model.regressors", REGRESSOR, Regressor, path)

    def gmm_instruments(self, value) -> Any:
        path = ("instruments", "gmm")
        if not isinstance(value, list) or not value or not all(isinstance(g, dict) for g in value):
            self.add("[instruments] gmm", "must be a list of [[instruments.gmm]] tables with "
                     'name (and lags = [first, last], form)', value, path)
            return MISSING
        return self.named_tables(value, "instruments.gmm", GMM_INSTRUMENT, GmmInstrument, path)

    def named_tables(self, value: list, table: str, schema, make, path: Path_) -> tuple:
        """Each ``[[table]]`` entry checked against ``schema`` (its problems named by
        position and name) and built with ``make``; entries without a name are left out
        (the missing name is reported by the field check)."""
        out = []
        for i, entry in enumerate(value, start=1):
            label = entry.get("name")
            header = (f"[[{table}]] #{i} ({key_text(label)})" if isinstance(label, str)
                      else f"[[{table}]] #{i}")
            self.unknown_keys(entry, tuple(schema), table, header)
            got = self.fields(entry, schema, header, path + (i,))
            if "name" in got:
                out.append(make(**got))
        return tuple(out)

    def sample(self, table: dict, header: str, where: str, path: Path_) -> SampleFilter:
        self.unknown_keys(table, tuple(SAMPLE), where, header)
        got = self.fields(table, SAMPLE, header, path)
        pf, pt = got["period_from"], got["period_to"]
        if pf is not None and pt is not None and pf > pt:
            self.add(f"{header} period_from = {pf}, period_to", "must not be before period_from",
                     pt, path + ("period_to",))
        for key, keys in (("exclude", EXCLUDE), ("keep", KEEP)):
            if key not in table:
                continue
            sub = table[key]
            if not isinstance(sub, dict):
                self.add(f"{header} {key}",
                         f'must be a table: {key} = {{column = "...", values = [...]}}', sub,
                         path + (key,))
            else:
                eh = f"{header} {key}"
                self.unknown_keys(sub, tuple(keys), f"{where}.{key}", eh)
                got.update(self.fields(sub, keys, eh, path + (key,)))
        if where == "sample" and got.get("split") is not None:
            self.add(f"{header} split", "splits only a varied sample: put it in "
                     "[[audit.vary.sample]] (the base sample is one sample)", got["split"],
                     path + ("split",))
            got["split"] = None
        if "name" not in got:
            got["name"] = describe_sample(pf, pt, got.get("exclude_column"),
                                          got.get("exclude_values", ()),
                                          got.get("keep_column"), got.get("keep_values", ()),
                                          got.get("split"))
        return SampleFilter(**got)

    def vary(self, table: dict) -> Vary:
        header, path = "[audit.vary]", ("audit", "vary")
        self.unknown_keys(table, VARY_KEYS, "audit.vary", header)
        values: dict[str, Any] = {}
        for key, spec in VARY.items():
            if spec is TABLE or key not in table:
                continue
            got = self._vary_list(table[key], spec.check, f"{header} {key}", path + (key,))
            if got is not None:
                values[spec.field] = got
        for key, check in VARY_PER_NAME.items():
            if key not in table:
                continue
            head = f"[audit.vary.{key}]"
            pairs = []
            for name, raw in self.table(table, key, head, path + (key,)).items():
                if not name.strip():
                    # the key names the regressor whose settings are tried
                    self.add(f"{head} {key_text(name)}", "the key is empty: each key is the "
                             "name of a regressor of the model", raw, path + (key, name))
                    continue
                got = self._vary_list(raw, check, f"{head} {key_text(name)}", path + (key, name))
                if got is not None:
                    pairs.append((name, got))
            values[key] = tuple(pairs)
        if "sample" in table:
            raw = table["sample"]
            if not isinstance(raw, list) or not all(isinstance(s, dict) for s in raw):
                self.add("[audit.vary] sample",
                         "must be a list of [[audit.vary.sample]] tables", raw, path + ("sample",))
            elif not raw:
                self.add("[audit.vary] sample", "lists no samples; remove the key or add one", raw,
                         path + ("sample",))
            else:
                samples = []
                for i, s in enumerate(raw, start=1):
                    label = s.get("name")
                    head = (f"[[audit.vary.sample]] #{i} ({key_text(label)})"
                            if isinstance(label, str) else f"[[audit.vary.sample]] #{i}")
                    samples.append(self.sample(s, head, "audit.vary.sample",
                                               path + ("sample", i)))
                values["samples"] = tuple(samples)
        return Vary(**values)

    def _vary_list(self, raw, check, where, path: Path_):
        if not isinstance(raw, list):
            self.add(where, "must be a list of values to try, e.g. [1, 2]", raw, path)
            return None
        if not raw:
            self.add(where, "lists no values; remove the key or give at least one value", raw, path)
            return None
        out, ok = [], True
        for item in raw:
            try:
                parsed = check(item)
            except Bad as bad:
                self.add(where, f"{fmt(item)} is not valid: {bad}", raw, path)
                ok = False
                continue
            if parsed in out and type(parsed) is type(out[out.index(parsed)]):
                self.add(where, f"{fmt(item)} is listed twice", raw, path)
                ok = False
                continue
            out.append(parsed)
        return tuple(out) if ok else None


def read_section(path, section: str, check: Callable):
    """The settings of the side section ``[section]`` (not part of the ``Spec``) of the
    model file at ``path``, which :func:`robustgmm.modelfile.read_model` has read:
    ``check(table, reader)`` gives them; a bad value raises its one line."""
    from . import load_toml
    path = Path(path)
    table = load_toml(path).get(section, {})
    if not isinstance(table, dict):
        raise InputError(f"{path}: [{section}]: must be a table (a [section] with keys)")
    reader = Reader(str(path))
    settings = check(table, reader)
    if reader.problems:
        raise InputError(reader.problems)
    return settings
