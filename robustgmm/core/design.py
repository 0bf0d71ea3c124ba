"""The estimation design: which rows, regressors and instruments a model uses, and
the per-chunk arrays (transformed equation, level equation, instrument blocks).

Rows live on the calendar. For unit ``i`` and calendar index ``t``:

* ``complete[i, t]``: the outcome and every regressor term (with its lag) are
  observed at ``t``.
* transformed equation, first differences (Arellano & Bond 1991): row ``t`` exists
  when ``complete[t]`` and ``complete[t-1]``; values ``v_t - v_{t-1}``.
* transformed equation, forward orthogonal deviations (Arellano & Bover 1995):
  the deviation of complete period ``s`` from the mean of the unit's later complete
  periods, ``c_s (v_s - mean_{r>s} v_r)``, ``c_s = sqrt(n_s / (n_s + 1))`` with
  ``n_s`` later complete periods. It is *stored at row* ``s + 1``: instrument lags are
  counted from there, so that ``first_lag = 2`` gives the outcome's levels up to
  ``s - 1`` (all valid for a deviation that starts at ``s``) and the same lag
  windows describe the same instrument sets under both transforms.
* level equation (system GMM; Arellano & Bover 1995, Blundell & Bond 1998): row
  ``t`` exists when ``complete[t]`` and ``complete[t-1]``, so that the lagged
  difference instruments are defined (as in Blundell & Bond 1998).

Instruments (all zero where a row or a source value is missing):

* transformed equation, lagged levels (GMM style): for the outcome and endogenous
  regressors lags ``first_lag .. last_lag``; for predetermined regressors the window
  starts and ends one lag sooner; a variable with its own ``instrument_lags`` (and
  external ``[[instruments.gmm]]`` columns) uses its own window and form.
  Per-period: one column per (row period, lag); collapsed: one column per lag
  (Roodman 2009).
* level equation, lagged differences: ``Δv`` dated ``first_lag - 1`` periods back
  (one period less for predetermined regressors); per-period or collapsed. Deeper
  lags are redundant given the transformed-equation instruments (Blundell & Bond 1998).
* exogenous regressors and extra instrument columns instrument themselves: the
  transformed value in the transformed equation and the first difference in the
  level equation (valid when the variable's correlation with the unit effect is
  constant over time, the same condition that system GMM imposes on the others).
* time effects: the transformed period dummies in the transformed equation and,
  in system GMM, the constant and the period dummies in the level equation. In
  system GMM most transformed-equation time moments repeat level ones (a
  differenced residual is the difference of two level residuals), but not all: the
  first transformed row involves the level shock of a period without a level row,
  and with attrition more rows do. :meth:`Design.time_functionals` expresses each
  time moment as a linear function of the level residuals, and the estimator keeps
  those that are not implied by the ones before them (level moments first).
"""
from __future__ import annotations

from dataclasses import dataclass, field

import numpy as np

from ..data import Panel
from ..errors import EstimationError
from ..options import LEVEL_GROUP, Equations, Form, Role, Transform, parse
from ..spec import CONST_LABEL, Spec, period_label, term_label

TRANSFORMED = 0
LEVEL = 1


@dataclass(frozen=True)
class Term:
    """A column built from data: variable ``var`` lagged ``lag`` periods."""

    var: str
    lag: int
    label: str


@dataclass
class InstrumentColumn:
    group: str
    equation: int
    description: str


@dataclass
class RowBlock:
    """Instrument entries of one row (equation, calendar index) of every unit.

    ``cols``: global instrument columns; the values of the entries come from
    ``sources`` (see :meth:`Design._block_values`).
    """

    equation: int
    t: int
    cols: np.ndarray
    lev_var: np.ndarray = field(default_factory=lambda: np.zeros(0, int))
    lev_src: np.ndarray = field(default_factory=lambda: np.zeros(0, int))
    lev_cols: np.ndarray = field(default_factory=lambda: np.zeros(0, int))
    dif_var: np.ndarray = field(default_factory=lambda: np.zeros(0, int))
    dif_src: np.ndarray = field(default_factory=lambda: np.zeros(0, int))
    dif_cols: np.ndarray = field(default_factory=lambda: np.zeros(0, int))
    own_idx: np.ndarray = field(default_factory=lambda: np.zeros(0, int))
    own_cols: np.ndarray = field(default_factory=lambda: np.zeros(0, int))


@dataclass
class Chunk:
    """Arrays of one chunk of units (``n`` units, ``P`` calendar periods).

    ``y[e]`` (n, P) and ``x[e]`` (n, P, K) hold equation ``e`` (0 transformed,
    1 level) with zeros where the row is absent; ``blocks`` hold the instrument
    values of each row, ``(block, values (n, m))`` (empty for a chunk built for the
    kernels, which read ``levels_t`` and ``augmented``). ``ylev``/``xlev`` are the
    levels on ``complete`` periods, used for the AR tests.
    """

    n: int
    y: list
    x: list
    rows: list
    blocks: list
    ylev: np.ndarray
    xlev: np.ndarray
    complete: np.ndarray
    #: (V·P, n): the raw variables (NaN where missing), row ``v·P + p`` variable ``v``
    #: at period ``p``; the source of the lagged-level and difference instruments
    levels_t: np.ndarray | None = None
    #: per equation, (n, P, X columns + extra instrument terms): the source of the
    #: "own" instrument entries (exogenous regressors, extra columns, time effects)
    augmented: list | None = None


def _either(kind, value, yes, no) -> bool:
    """Whether the option ``value`` of the two-word vocabulary ``kind`` is ``yes``
    (True) or ``no`` (False); anything else raises."""
    match parse(kind, value):
        case member if member is yes:
            return True
        case member if member is no:
            return False
        case other:
            raise ValueError(f"unknown {kind.__name__.lower()} {other!r}")


class Design:
    """Everything about a model that does not depend on the coefficients."""

    def __init__(self, spec: Spec, panel: Panel):
        self.spec = spec
        self.panel = panel
        self.system = _either(Equations, spec.equations, Equations.SYSTEM, Equations.DIFFERENCE)
        self.fod = _either(Transform, spec.transform, Transform.FOD, Transform.FD)
        self.collapsed = _either(Form, spec.form, Form.COLLAPSED, Form.PER_PERIOD)
        missing = [c for c in spec.used_columns() if c not in panel.values]
        if missing:
            raise EstimationError(f"columns missing from the panel: {', '.join(missing)}")
        self.P = panel.n_periods
        # raw variables stacked once: (N, V, P)
        self.var_names = list(spec.used_columns())
        self.var_index = {v: i for i, v in enumerate(self.var_names)}
        self.terms = [Term(v, lag, lab) for v, lag, lab in spec.regressor_terms()]
        self.extra_terms = [Term(v, 0, term_label(v, 0)) for v in spec.extra_instruments]
        self.term_roles = []
        for reg in spec.regressors:
            self.term_roles.extend([parse(Role, reg.role)] * len(reg.lags))
        self.term_roles = ["outcome"] * len(spec.outcome_lags) + self.term_roles
        self.time_invariant = self._time_invariant_terms()
        self._global_masks()
        self._x_columns()
        self._instrument_layout()

    def _time_invariant_terms(self) -> frozenset:
        """Labels of the regressor terms whose variable does not vary within any unit
        (education, sector, a founding cohort): every transform removes them, so
        difference GMM cannot estimate them, and in system GMM they are identified
        from the level equation only (see :meth:`_instrument_layout`)."""
        out = []
        for term, role in zip(self.terms, self.term_roles):
            if role == "outcome":
                continue
            v = self.panel.values[term.var]
            missing = np.isnan(v)
            lo = np.where(missing, np.inf, v).min(axis=1)
            hi = np.where(missing, -np.inf, v).max(axis=1)
            seen = np.isfinite(lo)
            scale = np.maximum(np.abs(lo[seen]), np.abs(hi[seen])) if seen.any() else 0.0
            tol = 1e-12 * np.maximum(scale, 1.0)
            # constant within units but not across them (a column constant everywhere
            # is a degenerate column, left to the data layer's message)
            if (seen.any() and np.all(hi[seen] - lo[seen] <= tol)
                    and np.ptp(lo[seen]) > tol.max()):
                out.append(term.label)
        return frozenset(out)

    # ------------------------------------------------------------------ rows
    def _complete(self, values: dict) -> np.ndarray:
        spec = self.spec
        ok = ~np.isnan(values[spec.outcome])
        for term in self.terms:
            ok &= ~np.isnan(_shift(values[term.var], term.lag))
        for term in self.extra_terms:
            ok &= ~np.isnan(values[term.var])
        return ok

    def _rows_from_complete(self, complete: np.ndarray):
        prev = np.zeros_like(complete)
        prev[:, 1:] = complete[:, :-1]
        both = complete & prev
        if self.fod:
            later = _later_count(complete)
            dev = complete & (later > 0)
            rows_t = np.zeros_like(complete)
            rows_t[:, 1:] = dev[:, :-1]
        else:
            rows_t = both
        rows_l = both if self.system else np.zeros_like(complete)
        return rows_t, rows_l

    def _global_masks(self):
        values = self.panel.values
        complete = self._complete(values)
        rows_t, rows_l = self._rows_from_complete(complete)
        self.row_any = [rows_t.any(axis=0), rows_l.any(axis=0)]
        self.unit_has_rows = rows_t.any(axis=1) | rows_l.any(axis=1)
        self.n_rows = [int(rows_t.sum()), int(rows_l.sum())]
        self.complete_any = complete.any(axis=0)
        # the time functionals depend on a unit's pattern of complete periods only
        # (see time_gram); kept for them, one bool per unit-period
        self._complete_all = complete
        if self.n_rows[0] == 0:
            raise EstimationError(
                "no observations left: no unit has enough consecutive complete periods "
                f"for the lags and the {'deviations' if self.fod else 'differences'}")
        self.sample_mask = self._sample_mask(complete, rows_t, rows_l)

    def _sample_mask(self, complete, rows_t, rows_l):
        used = rows_l.copy()
        if self.fod:
            dev = np.zeros_like(rows_t)
            dev[:, :-1] = rows_t[:, 1:]
            has_dev = dev.any(axis=1)
            used |= complete & has_dev[:, None]
        else:
            used |= rows_t
            used[:, :-1] |= rows_t[:, 1:]
        return used

    # --------------------------------------------------------------- columns
    def _x_columns(self):
        spec = self.spec
        labels = [t.label for t in self.terms]
        kinds = ["term"] * len(self.terms)
        self.dummy_periods = []
        if self.system:
            labels.append(CONST_LABEL)
            kinds.append("const")
        if spec.time_effects:
            idx = np.flatnonzero(self.complete_any)
            self.dummy_periods = [int(i) for i in idx]
            for i in idx:
                labels.append(period_label(self.panel.periods[i]))
                kinds.append("dummy")
        self.x_labels_all = labels
        self.x_kinds_all = kinds
        self.keep_x = np.arange(len(labels))

    def set_kept_columns(self, keep: np.ndarray):
        """Restrict the regressors to ``keep`` (after the collinearity scan)."""
        self.keep_x = np.asarray(keep, dtype=int)
        self.x_labels = [self.x_labels_all[i] for i in self.keep_x]
        kept = set(self.keep_x.tolist())
        # an instrument that is a dropped dummy would only repeat the others
        self.keep_z = np.asarray([j for j in range(self.L_all)
                                  if self.z_xdep[j] < 0 or self.z_xdep[j] in kept], dtype=int)

    # ------------------------------------------------------------ instruments
    def _gmm_windows(self):
        """(variable, first lag, last lag, collapsed) of each lagged-level instrument set.

        The outcome and endogenous regressors use lags ``first_lag .. last_lag``;
        predetermined ones one lag sooner, ``max(first_lag − 1, 1) .. max(last_lag
        − 1, 1)`` (lag 0 would be correlated with the differenced shock); exogenous
        ones instrument themselves (no window). A variable with its own window
        (``instrument_lags``) uses it as given, and its own form when set; external
        GMM-style instruments (``[[instruments.gmm]]``) follow, with their own
        window or the global one. ``invalid_reason`` refuses own windows that start
        at lag 1 for the outcome or an endogenous regressor."""
        spec = self.spec
        first = spec.first_lag
        last = spec.last_lag if spec.last_lag is not None else self.P

        def window(name, own, form, lo, hi):
            collapsed = self.collapsed if form is None else parse(Form, form) == Form.COLLAPSED
            if own is not None:
                lo, hi = own[0], own[1] if own[1] is not None else self.P
            return (name, lo, hi, collapsed)

        out = [window(spec.outcome, spec.outcome_instrument_lags, spec.outcome_instrument_form,
                      first, last)]
        for reg in spec.regressors:
            match parse(Role, reg.role):
                case Role.ENDOGENOUS:
                    out.append(window(reg.name, reg.instrument_lags, reg.instrument_form,
                                      first, last))
                case Role.PREDETERMINED:
                    out.append(window(reg.name, reg.instrument_lags, reg.instrument_form,
                                      max(first - 1, 1), max(last - 1, 1)))
                case Role.EXOGENOUS:
                    pass
                case other:
                    raise ValueError(f"unknown role {other!r}")
        for inst in spec.gmm_instruments:
            out.append(window(inst.name, inst.lags, inst.form, first, last))
        return out

    def _instrument_layout(self):
        spec = self.spec
        P = self.P
        values = self.panel.values
        cols: list[InstrumentColumn] = []
        xdep: list[int] = []  # X column an instrument copies (dummies), else -1
        entries = {}  # (eq, t) -> dict of lists

        def entry(eq, t):
            return entries.setdefault((eq, t), {"lev": [], "dif": [], "own": []})

        def new_col(group, eq, desc, dep=-1):
            cols.append(InstrumentColumn(group, eq, desc))
            xdep.append(dep)
            return len(cols) - 1

        rows_t_any, rows_l_any = self.row_any
        observed = {v: ~np.isnan(values[v]) for v in self.var_names}
        # rows per period with at least one unit, used to drop empty columns early
        complete = self._complete(values)
        rows_t, rows_l = self._rows_from_complete(complete)
        for var, lo, hi, collapsed in self._gmm_windows():
            vi = self.var_index[var]
            group = f"levels of {var}"
            lag_col = {}
            for t in np.flatnonzero(rows_t_any):
                for lag in range(lo, hi + 1):
                    src = t - lag
                    if src < 0:
                        break
                    if not (rows_t[:, t] & observed[var][:, src]).any():
                        continue
                    if collapsed:
                        if lag not in lag_col:
                            lag_col[lag] = new_col(group, TRANSFORMED, f"{var} lag {lag}")
                        c = lag_col[lag]
                    else:
                        c = new_col(group, TRANSFORMED,
                                    f"{var} lag {lag} for period {self.panel.periods[t]}")
                    entry(TRANSFORMED, t)["lev"].append((vi, src, c))
        if self.system:
            for var, lo, _, collapsed in self._gmm_windows():
                vi = self.var_index[var]
                dlag = lo - 1
                group = LEVEL_GROUP
                col = None
                for t in np.flatnonzero(rows_l_any):
                    src = t - dlag
                    if src < 1 or src > P - 1:
                        continue
                    ok = rows_l[:, t] & observed[var][:, src] & observed[var][:, src - 1]
                    if not ok.any():
                        continue
                    if collapsed:
                        if col is None:
                            col = new_col(group, LEVEL, f"difference of {var} lag {dlag}")
                        c = col
                    else:
                        c = new_col(group, LEVEL, f"difference of {var} lag {dlag} "
                                    f"for period {self.panel.periods[t]}")
                    entry(LEVEL, t)["dif"].append((vi, src, c))
        # exogenous regressors and extra columns: "own" entries point at the
        # augmented transformed/level arrays (terms + extra terms)
        own_terms = [j for j, role in enumerate(self.term_roles) if role == Role.EXOGENOUS]
        own_terms += [len(self.terms) + j for j in range(len(self.extra_terms))]
        all_terms = self.terms + self.extra_terms
        n_terms = len(self.terms)
        k_all = len(self.x_labels_all)
        for j in own_terms:
            c = new_col("exogenous", TRANSFORMED, f"{all_terms[j].label} (transformed)")
            for t in np.flatnonzero(rows_t_any):
                entry(TRANSFORMED, t)["own"].append((self._aug_index(j, n_terms, k_all), c))
        if self.system:
            for j in own_terms:
                term = all_terms[j]
                if term.label in self.time_invariant:
                    # its difference is zero: the level itself instruments the level
                    # equation, valid when the term is uncorrelated with the unit effect
                    c = new_col("exogenous", LEVEL, f"{term.label} (level, level equation)")
                    for t in np.flatnonzero(rows_l_any):
                        entry(LEVEL, t)["own"].append((self._aug_index(j, n_terms, k_all), c))
                    continue
                c = new_col("exogenous", LEVEL, f"{all_terms[j].label} (difference, level equation)")
                vi = self.var_index[term.var]
                for t in np.flatnonzero(rows_l_any):
                    src = t - term.lag
                    if src < 1:
                        continue
                    entry(LEVEL, t)["dif"].append((vi, src, c))
        # time effects
        for k, kind in enumerate(self.x_kinds_all):
            if kind not in ("const", "dummy"):
                continue
            label = self.x_labels_all[k]
            if kind == "dummy":
                c = new_col("time effects", TRANSFORMED, f"{label} (transformed)", dep=k)
                for t in np.flatnonzero(rows_t_any):
                    entry(TRANSFORMED, t)["own"].append((k, c))
            if self.system:
                c = new_col("time effects", LEVEL, f"{label} (level equation)", dep=k)
                for t in np.flatnonzero(rows_l_any):
                    entry(LEVEL, t)["own"].append((k, c))

        self.z_columns = cols
        self.z_xdep = np.asarray(xdep, dtype=int)
        self.L_all = len(cols)
        blocks = []
        for (eq, t), ent in sorted(entries.items()):
            lev = np.asarray(ent["lev"], dtype=int).reshape(-1, 3)
            dif = np.asarray(ent["dif"], dtype=int).reshape(-1, 3)
            own = np.asarray(ent["own"], dtype=int).reshape(-1, 2)
            block = RowBlock(
                equation=eq, t=int(t),
                cols=np.concatenate([lev[:, 2], dif[:, 2], own[:, 1]]),
                lev_var=lev[:, 0], lev_src=lev[:, 1], lev_cols=lev[:, 2],
                dif_var=dif[:, 0], dif_src=dif[:, 1], dif_cols=dif[:, 2],
                own_idx=own[:, 0], own_cols=own[:, 1])
            blocks.append(block)
        self.blocks = blocks
        self.keep_z = np.arange(self.L_all)

    @staticmethod
    def _aug_index(j, n_terms, k_all):
        # extra instrument terms sit after all X columns in the augmented arrays
        return j if j < n_terms else k_all + (j - n_terms)

    # ----------------------------------------------------------------- chunks
    def chunk(self, lo: int, hi: int, blocks: bool = True) -> Chunk:
        """Build the arrays of units ``lo:hi`` (all X columns, all instruments).

        ``blocks=False`` leaves out the per-block instrument values (``Chunk.blocks``
        empty): the kernels lay the entries out from ``levels_t`` and ``augmented``
        themselves (:func:`.moments.prepare`)."""
        return self._chunk({v: self.panel.values[v][lo:hi] for v in self.var_names}, hi - lo,
                           blocks)

    def chunk_of(self, units: np.ndarray) -> Chunk:
        """The arrays of the units at positions ``units`` (as :meth:`chunk`)."""
        units = np.asarray(units, dtype=np.intp)
        return self._chunk({v: self.panel.values[v][units] for v in self.var_names}, len(units))

    def _chunk(self, values: dict, n: int, with_blocks: bool = True) -> Chunk:
        P = self.P
        complete = self._complete(values)
        rows_t, rows_l = self._rows_from_complete(complete)
        n_x = len(self.x_labels_all)
        # augmented levels: X columns then extra instrument terms, zero off complete
        # periods (where every one of them is observed); masked in place, as the
        # arrays are written once and read by every pass
        aug = np.zeros((n, P, n_x + len(self.extra_terms)))
        for j, term in enumerate(self.terms):
            aug[:, :, j] = _shift(values[term.var], term.lag)
        for j, kind in enumerate(self.x_kinds_all):
            if kind == "const":
                aug[:, :, j] = 1.0
        dummy_cols = [j for j, kind in enumerate(self.x_kinds_all) if kind == "dummy"]
        for j, t in zip(dummy_cols, self.dummy_periods):
            aug[:, t, j] = 1.0
        for j, term in enumerate(self.extra_terms):
            aug[:, :, n_x + j] = values[term.var]
        ylev = np.where(complete, values[self.spec.outcome], 0.0)
        np.copyto(aug, 0.0, where=~complete[:, :, None])

        if self.fod:
            ytr, augtr = _fod(ylev, aug, complete)
        else:
            ytr = np.empty_like(ylev)
            ytr[:, 0] = 0.0
            np.subtract(ylev[:, 1:], ylev[:, :-1], out=ytr[:, 1:])
            augtr = np.empty_like(aug)
            augtr[:, 0] = 0.0
            np.subtract(aug[:, 1:], aug[:, :-1], out=augtr[:, 1:])
        np.copyto(ytr, 0.0, where=~rows_t)
        np.copyto(augtr, 0.0, where=~rows_t[:, :, None])
        # the transform of a time-invariant term is zero: exactly (no FOD rounding)
        for j, term in enumerate(self.terms):
            if term.label in self.time_invariant:
                augtr[:, :, j] = 0.0
        if self.system:
            ylv = np.where(rows_l, ylev, 0.0)
            auglv = np.where(rows_l[:, :, None], aug, 0.0)
        else:  # no level rows (np.zeros: pages untouched until read)
            ylv, auglv = np.zeros(ylev.shape), np.zeros(aug.shape)

        # the raw variables, period-major: row v·P + p holds variable v at period p
        levels_t = np.stack([values[v].T for v in self.var_names]).reshape(-1, n)
        blocks = []
        for block in (self.blocks if with_blocks else ()):
            eq, t = block.equation, block.t
            rmask = (rows_t if eq == TRANSFORMED else rows_l)[:, t]
            parts = []
            if block.lev_var.size:
                parts.append(levels_t[block.lev_var * P + block.lev_src].T)
            if block.dif_var.size:
                parts.append((levels_t[block.dif_var * P + block.dif_src]
                              - levels_t[block.dif_var * P + block.dif_src - 1]).T)
            if block.own_idx.size:
                src = augtr if eq == TRANSFORMED else auglv
                parts.append(src[:, t, block.own_idx])
            vals = np.concatenate(parts, axis=1) if len(parts) > 1 else parts[0]
            vals = np.where(rmask[:, None] & ~np.isnan(vals), vals, 0.0)
            blocks.append((block, vals))
        return Chunk(
            n=n,
            y=[ytr, ylv],
            x=[augtr[:, :, :n_x], auglv[:, :, :n_x]],
            rows=[rows_t, rows_l],
            blocks=blocks,
            ylev=ylev,
            xlev=aug[:, :, :n_x],
            complete=complete,
            levels_t=levels_t,
            augmented=[augtr, auglv],
        )

    # ------------------------------------------------------------- summaries
    def time_columns(self) -> np.ndarray:
        """Instrument columns of the time effects (the constant and period dummies),
        level-equation columns first: the order in which redundant ones are found."""
        cols = [j for j, c in enumerate(self.z_columns) if c.group == "time effects"]
        return np.asarray(sorted(cols, key=lambda j: (self.z_columns[j].equation != LEVEL, j)),
                          dtype=np.int64)

    def time_functionals(self, x_tr: np.ndarray, x_lv: np.ndarray | None, complete: np.ndarray,
                         cols: np.ndarray) -> np.ndarray:
        """Each time-effect moment of each unit as a linear function of the unit's
        level residuals: ``A_i`` (n, P, len(cols)) with ``g_ij = Σ_p A_i[p, j] e_ip``.

        The instrument of a time column is the dummy (or constant) column of its
        equation (``x_tr``/``x_lv``, zero where a row is absent). A first-difference
        row ``t`` is ``e_t − e_{t−1}``; a forward deviation stored at row ``s + 1`` is
        ``c_s (e_s − Σ_{later complete q} e_q / n_s)`` (Arellano & Bover 1995); a
        level row ``t`` is ``e_t``. Two moments repeat each other for every residual
        exactly when these functionals are linearly dependent, i.e. when
        ``Σ_i A_i'A_i`` is singular.
        """
        n, P = complete.shape
        A = np.zeros((n, P, len(cols)))
        if self.fod:
            later = _later_count(complete)
            ok = complete & (later > 0)
            cnt = np.where(ok, later, 1).astype(float)
            c = np.where(ok, np.sqrt(cnt / (cnt + 1.0)), 0.0)
        for pos, j in enumerate(cols):
            k = int(self.z_xdep[j])
            if self.z_columns[j].equation == LEVEL:
                A[:, :, pos] += x_lv[:, :, k]
                continue
            z = x_tr[:, :, k]
            if not self.fod:
                A[:, :, pos] += z
                A[:, :-1, pos] -= z[:, 1:]
                continue
            zs = np.zeros((n, P))
            zs[:, :-1] = z[:, 1:]  # the deviation of period s, stored at row s + 1
            A[:, :, pos] += c * zs
            w = np.cumsum(c / cnt * zs, axis=1)
            prior = np.zeros((n, P))
            prior[:, 1:] = w[:, :-1]
            A[:, :, pos] -= np.where(complete, prior, 0.0)
        return A

    def time_gram(self, cols: np.ndarray) -> np.ndarray:
        """``Σ_i A_i'A_i`` of the time functionals (:meth:`time_functionals`) over every
        unit, for the time columns ``cols``.

        ``A_i`` is built from the unit's dummy and constant columns of both equations,
        which depend on its pattern of complete periods only (the rows follow from it,
        and so do the first differences and forward deviations of the dummies). The sum
        is therefore ``Σ_patterns count · A'A`` over the distinct patterns, each built
        once from one unit that has it: a few units instead of all of them (a balanced
        panel has one pattern). With first differences the entries are small whole
        numbers, so the sum is exactly the unit-by-unit sum."""
        complete = self._complete_all
        k = len(cols)
        N, P = complete.shape
        if P <= 62:  # one whole number per pattern
            codes = complete.astype(np.int64) @ (np.int64(1) << np.arange(P, dtype=np.int64))
            _, first, counts = np.unique(codes, return_index=True, return_counts=True)
        else:
            _, first, counts = np.unique(np.packbits(complete, axis=1), axis=0,
                                         return_index=True, return_counts=True)
        ch = self.chunk_of(first)
        x_tr, x_lv = ch.x[0], (ch.x[1] if self.system else None)
        A = self.time_functionals(x_tr, x_lv, ch.complete, cols)
        A2 = A.reshape(-1, k)
        weights = np.repeat(counts.astype(np.float64), P)
        return (A2 * weights[:, None]).T @ A2

    def instrument_groups(self) -> dict[str, np.ndarray]:
        """Positions (within the kept instruments) of each instrument group."""
        groups: dict[str, list[int]] = {}
        for pos, j in enumerate(self.keep_z):
            groups.setdefault(self.z_columns[j].group, []).append(pos)
        return {g: np.asarray(p, dtype=int) for g, p in groups.items()}


def _shift(arr: np.ndarray, lag: int) -> np.ndarray:
    """Lag along the calendar axis (axis 1); NaN where the lag falls off the panel."""
    if lag == 0:
        return arr
    out = np.full(arr.shape, np.nan)
    if lag < arr.shape[1]:
        out[:, lag:] = arr[:, :-lag]
    return out


def _later_count(complete: np.ndarray) -> np.ndarray:
    """Number of complete periods strictly after each period, per unit."""
    rev = np.cumsum(complete[:, ::-1], axis=1)[:, ::-1]
    later = np.zeros(complete.shape, dtype=np.int64)
    later[:, :-1] = rev[:, 1:]
    return later


def _fod(ylev, aug, complete):
    """Forward orthogonal deviations stored at row ``s + 1`` (see module docstring).

    ``c_s (v_s - mean of later complete v)``, ``c_s = sqrt(n_s/(n_s+1))``
    (Arellano & Bover 1995, eq. for the forward orthogonal deviations operator,
    applied to each unit's sequence of complete periods).
    """
    later = _later_count(complete)
    w = complete.astype(float)

    def later_sum(arr):
        rev = np.cumsum((arr * (w if arr.ndim == 2 else w[:, :, None]))[:, ::-1], axis=1)[:, ::-1]
        out = np.zeros_like(arr)
        out[:, :-1] = rev[:, 1:]
        return out

    ok = complete & (later > 0)
    cnt = np.where(ok, later, 1).astype(float)
    c = np.where(ok, np.sqrt(cnt / (cnt + 1.0)), 0.0)
    ydev = c * (ylev - later_sum(ylev) / cnt)
    adev = c[:, :, None] * (aug - later_sum(aug) / cnt[:, :, None])
    yout = np.zeros_like(ylev)
    aout = np.zeros_like(aug)
    yout[:, 1:] = ydev[:, :-1]
    aout[:, 1:] = adev[:, :-1]
    return yout, aout
