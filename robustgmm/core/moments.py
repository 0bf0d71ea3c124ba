"""Sums over units of small matrix products, batched over chunks of units.

Every quantity of the estimator is a sum over units ``i`` of ``Z_i' H Z_i``,
``Z_i' X_i``, ``Z_i' y_i``, of per-unit moment vectors ``g_i = Z_i' e_i`` or of the
Windmeijer (2005) terms built from them. Nothing here loops over units: each
function is a handful of BLAS calls per chunk of units.

Kernel layout (see DEVELOPERS.md, "Where time goes"). A design's instruments are
stored row by row: one *block* per equation and calendar period holding only that
row's non-zero columns, so per-period instruments cost what their non-zero blocks
cost (a few percent of the dense stacked matrix). :class:`Layout` lays the blocks
of one design side by side, ``W`` entries in all; for each chunk,
:func:`prepare` builds a :class:`Prepared` chunk:

* ``ZT`` (W, n): the instrument entries of every unit, block after block,
  transposed so that a block is a contiguous row range (a BLAS operand as is);
* ``Y`` (R, n) and ``X`` (R, n, K): outcome and regressors of every row slot
  (equation, period), zero where a unit has no such row;
* the levels the AR(m) tests need.

With the 0/1 matrix ``C`` (L × W) that sends each entry to its instrument column,
``G' = C (ZT ∘ E[row of entry])`` for residual rows ``E = Y − X b``: one gather,
one product and one sparse-times-dense product per chunk and coefficient vector,
O(n·W). ``Z'X`` is ``C`` times the stack of the blocks' ``ZT_b X_r`` products,
``Z'HZ`` a sum of the blocks' ``ZT_b ZT_b'`` (and, for first differences, the
products of neighbouring blocks).
"""
from __future__ import annotations

from dataclasses import dataclass

import numpy as np
from scipy import sparse

from .design import TRANSFORMED, Chunk, Design


def _structural_zeros(design: Design, block) -> np.ndarray:
    """Entries of a block that are zero for every unit by construction: the
    instruments of the period dummies (Design: one "own" entry per dummy in every
    row). The dummy of period ``s`` is non-zero in the level equation only at
    ``t = s``; first-differenced, only at ``t = s`` and ``t = s + 1``; as a forward
    orthogonal deviation (stored at row ``t`` for period ``t - 1``), only while
    ``t - 1 ≤ s``. Skipping them makes the time-effect blocks cost what their
    non-zero entries cost. :func:`prepare` checks that the skipped values are zero."""
    zero = np.zeros(len(block.cols), dtype=bool)
    first_own = len(block.lev_cols) + len(block.dif_cols)
    kinds = design.x_kinds_all
    period = dict(zip([k for k, kind in enumerate(kinds) if kind == "dummy"],
                      design.dummy_periods))
    t = block.t
    for i, k in enumerate(block.own_idx):
        s = period.get(int(k)) if int(k) < len(kinds) else None
        if s is None:
            continue
        if block.equation != TRANSFORMED:
            nonzero = t == s
        elif not design.fod:
            nonzero = t in (s, s + 1)
        else:
            nonzero = t - 1 <= s
        zero[first_own + i] = not nonzero
    return zero


class Layout:
    """Where each instrument entry of a design's blocks lives (shared by its chunks).

    Row slots are ``equation · P + period`` (transformed equation first). Only the
    entries that can be non-zero are laid out (``take`` of design block
    ``source``; :func:`_structural_zeros`). ``starts``/``stops``: each laid-out
    block's entry range; ``block_slot``: its slot;
    ``ent_slot``/``ent_col``: slot and instrument column of every entry;
    ``scatter``: the L × W 0/1 matrix ``C`` (CSR); ``pairs``: neighbouring
    transformed-equation blocks (``t``, ``t+1``) for the first-difference weight.
    """

    def __init__(self, design: Design):
        self.P = design.P
        self.equations = (0, 1) if design.system else (0,)
        self.R = self.P * len(self.equations)
        self.K = len(design.x_labels_all)
        self.L = design.L_all
        fd = self.fd = not design.fod
        # entries of each design block that can be non-zero (see _structural_zeros);
        # blocks left empty are not laid out at all
        self.take, self.drop, self.source = [], [], []
        for j, b in enumerate(design.blocks):
            zero = _structural_zeros(design, b)
            keep = np.flatnonzero(~zero)
            if keep.size:
                self.source.append(j)
                self.take.append(keep)
                self.drop.append(np.flatnonzero(zero))
        blocks = [design.blocks[j] for j in self.source]
        widths = np.asarray([len(t) for t in self.take], dtype=np.int64)
        self.starts = np.concatenate([[0], np.cumsum(widths)[:-1]]).astype(np.int64)
        self.stops = self.starts + widths
        self.W = int(widths.sum())
        self.block_slot = np.asarray([b.equation * self.P + b.t for b in blocks], dtype=np.int64)
        self.block_cols = [np.asarray(b.cols, dtype=np.int64)[t] for b, t in zip(blocks, self.take)]
        self.ent_slot = np.repeat(self.block_slot, widths)
        self.ent_col = (np.concatenate(self.block_cols) if blocks
                        else np.zeros(0, dtype=np.int64))
        self.scatter = sparse.csr_matrix(
            (np.ones(self.W), (self.ent_col, np.arange(self.W))), shape=(self.L, self.W))
        # one-step weight: 2 on the diagonal of first-differenced rows, 1 elsewhere
        self.block_diag = np.asarray(
            [2.0 if (b.equation == TRANSFORMED and fd) else 1.0 for b in blocks])
        # flat L×L positions of each block's own products and of neighbour products
        self.own_flat = [(c[:, None] * self.L + c[None, :]).ravel() for c in self.block_cols]
        by_row = {(b.equation, b.t): j for j, b in enumerate(blocks)}
        self.pairs = []
        if fd:
            for (eq, t), j in by_row.items():
                nxt = by_row.get((eq, t + 1))
                if eq == TRANSFORMED and nxt is not None:
                    ci, cj = self.block_cols[j], self.block_cols[nxt]
                    self.pairs.append((j, nxt, (ci[:, None] * self.L + cj[None, :]).ravel(),
                                       (cj[:, None] * self.L + ci[None, :]).ravel()))
        self.transformed_slots = slice(0, self.P)
        self._entry_sources(design, blocks)

    def _entry_sources(self, design: Design, blocks) -> None:
        """Where :func:`prepare` reads each laid-out entry: a lagged level (row
        ``lev_src`` of the chunk's ``levels_t``, at entry ``lev_pos``), a lagged
        difference (rows ``dif_src`` minus ``dif_src - 1``) or an "own" entry
        (flat column ``own_src`` = period · columns + column of the equation's
        augmented array ``own_eq``); ``zero_*`` the skipped structural zeros."""
        P = self.P
        lev_pos, lev_src, dif_pos, dif_src = [], [], [], []
        own = {0: ([], []), 1: ([], [])}
        zero = {0: [], 1: []}
        width = len(design.x_labels_all) + len(design.extra_terms)
        for j, b in enumerate(blocks):
            nl, nd = len(b.lev_var), len(b.dif_var)
            for pos, i in enumerate(self.take[j]):
                at = int(self.starts[j]) + pos
                if i < nl:
                    lev_pos.append(at)
                    lev_src.append(int(b.lev_var[i]) * P + int(b.lev_src[i]))
                elif i < nl + nd:
                    dif_pos.append(at)
                    dif_src.append(int(b.dif_var[i - nl]) * P + int(b.dif_src[i - nl]))
                else:
                    own[b.equation][0].append(at)
                    own[b.equation][1].append(b.t * width + int(b.own_idx[i - nl - nd]))
            for i in self.drop[j]:  # only own entries are structural zeros
                zero[b.equation].append(b.t * width + int(b.own_idx[i - nl - nd]))
        as_int = lambda v: np.asarray(v, dtype=np.intp)  # noqa: E731
        self.lev_pos, self.lev_src = as_int(lev_pos), as_int(lev_src)
        self.dif_pos, self.dif_src = as_int(dif_pos), as_int(dif_src)
        self.own = {e: (as_int(p), as_int(c)) for e, (p, c) in own.items() if p}
        self.zero = {e: as_int(c) for e, c in zero.items() if c}

    def scatter_rows(self, cols: np.ndarray) -> sparse.csr_matrix:
        """The rows of ``C`` of the instrument columns ``cols`` (in that order)."""
        return self.scatter[np.asarray(cols, dtype=np.int64)]

    def bytes_per_unit(self, n_extra: int = 0) -> tuple[int, int]:
        """(bytes of a prepared chunk, bytes while a chunk is built and passed over),
        per unit. The working figure covers the arrays of :meth:`Design.chunk` and the
        temporaries of a pass (residual gather, products, a few ``G'`` arrays)."""
        P, K, W, R, L = self.P, self.K + n_extra, self.W, self.R, self.L
        # ZT is new; y, x, rows (and the levels for deviations) are the chunk's own
        prepared = 8 * (W + R + R * K) + R + (0 if self.fd else 8 * P * (K + 1) + P)
        building = 8 * (P * K * 8 + 4 * P + 2 * W)
        passing = 8 * (3 * W + 4 * L + 2 * R + P * K * 3 + K)
        return prepared + 64, prepared + max(building, passing) + 64


@dataclass
class Prepared:
    """One chunk of ``n`` units in kernel layout (see the module docstring).

    ``ZT`` (W, n) is the only new array; ``y``/``x``/``rows`` are the design chunk's
    own arrays per equation ((n, P), (n, P, K), (n, P) bool; no copy). For forward
    orthogonal deviations the levels are kept for the AR(m) tests (``ylev``,
    ``xlev``, ``complete``); for first differences the transformed rows are the
    level differences those tests need.
    """

    n: int
    ZT: np.ndarray
    y: list
    x: list
    rows: list
    ylev: np.ndarray | None = None
    xlev: np.ndarray | None = None
    complete: np.ndarray | None = None

    @property
    def nbytes(self) -> int:
        arrays = [self.ZT, *self.y, *self.x, *self.rows]
        arrays += [a for a in (self.ylev, self.xlev, self.complete) if a is not None]
        seen, total = set(), 0
        for a in arrays:  # count shared buffers once
            base = a if a.base is None else a.base
            if id(base) not in seen:
                seen.add(id(base))
                total += base.nbytes
        return int(total)

    def level_differences(self):
        """``(dy, dx, dmask)``: first differences of the levels on consecutive complete
        periods, zero elsewhere ((n, P), (n, P, K), (n, P) bool)."""
        if self.ylev is None:
            # first differences: Design's rows_t = complete[t] & complete[t-1], and
            # the transformed values are exactly these differences
            return self.y[0], self.x[0], self.rows[0]
        comp = self.complete
        dmask = np.zeros_like(comp)
        dmask[:, 1:] = comp[:, 1:] & comp[:, :-1]
        dy = np.zeros_like(self.ylev)
        dy[:, 1:] = self.ylev[:, 1:] - self.ylev[:, :-1]
        dx = np.zeros_like(self.xlev)
        dx[:, 1:] = self.xlev[:, 1:] - self.xlev[:, :-1]
        return (np.where(dmask, dy, 0.0), np.where(dmask[:, :, None], dx, 0.0), dmask)


def prepare(chunk: Chunk, layout: Layout) -> Prepared:
    """Lay a design chunk's instrument entries side by side (the one copy made):
    each entry row of ``ZT`` is gathered from the chunk's raw levels (lagged levels
    and differences, NaN where missing) or from its augmented equation arrays (own
    entries), then zeroed where its row is absent or its value missing, as
    :meth:`.design.Design.chunk` does for each block."""
    n = chunk.n
    ZT = np.empty((layout.W, n))
    lev = chunk.levels_t
    ZT[layout.lev_pos] = lev[layout.lev_src]
    if layout.dif_pos.size:
        ZT[layout.dif_pos] = lev[layout.dif_src] - lev[layout.dif_src - 1]
    for e, (pos, src) in layout.own.items():
        flat = chunk.augmented[e].reshape(n, -1)
        ZT[pos] = flat[:, src].T
    for e, src in layout.zero.items():
        # one pass over the rows (the columns gathered one by one cost more)
        if (chunk.augmented[e].reshape(n, -1) != 0).any(axis=0)[src].any():
            raise RuntimeError("internal error: a period-dummy instrument entry assumed zero "
                               "is not (robustgmm.core.moments._structural_zeros)")
    eqs = layout.equations
    np.copyto(ZT, 0.0, where=np.isnan(ZT))
    # entries of absent rows: only the row slots where some unit lacks the row
    for j, slot in enumerate(layout.block_slot):
        e, t = divmod(int(slot), layout.P)
        absent = ~chunk.rows[eqs[e]][:, t]
        if absent.any():
            ZT[layout.starts[j]:layout.stops[j], absent] = 0.0
    pc = Prepared(n=n, ZT=ZT, y=[chunk.y[e] for e in eqs], x=[chunk.x[e] for e in eqs],
                  rows=[chunk.rows[e] for e in eqs])
    if not layout.fd:
        pc.ylev, pc.xlev, pc.complete = chunk.ylev, chunk.xlev, chunk.complete
    return pc


def _flat_x(x: np.ndarray) -> np.ndarray:
    return x.reshape(-1, x.shape[-1])  # a view when the design's array is contiguous


def first_moments(pc: Prepared, layout: Layout):
    """``Z'X``, ``Z'y``, ``Z'HZ`` and ``X'X`` (stacked equations) of one chunk.

    ``H`` is the one-step weight of Arellano & Bond (1991): for first differences
    the tridiagonal matrix with 2 on the diagonal and -1 next to it (the covariance
    of differenced i.i.d. errors up to σ²), for forward orthogonal deviations and the
    level equation the identity (Arellano & Bover 1995; Blundell & Bond 1998).
    Rows of consecutive calendar periods are neighbours; a gap breaks the band
    (an absent row is all zeros, so its products vanish).
    """
    L, K, P = layout.L, layout.K, layout.P
    xx = np.zeros((K, K))
    for x in pc.x:
        x2 = _flat_x(x)
        xx += x2.T @ x2
    zxw = np.empty((layout.W, K))
    zyw = np.empty(layout.W)
    zhz = np.zeros((L, L))
    flat = zhz.reshape(-1)
    ZT = pc.ZT
    for j, slot in enumerate(layout.block_slot):
        a, b = layout.starts[j], layout.stops[j]
        e, t = divmod(int(slot), P)
        zb = ZT[a:b]
        zxw[a:b] = zb @ pc.x[e][:, t, :]
        zyw[a:b] = zb @ pc.y[e][:, t]
        # columns are distinct within a block, so a fancy += adds each product once
        flat[layout.own_flat[j]] += layout.block_diag[j] * (zb @ zb.T).ravel()
    for j, k, fwd, bwd in layout.pairs:
        cross = ZT[layout.starts[j]:layout.stops[j]] @ ZT[layout.starts[k]:layout.stops[k]].T
        flat[fwd] -= cross.ravel()
        flat[bwd] -= cross.T.ravel()
    zx = layout.scatter @ zxw
    zy = layout.scatter @ zyw
    return zx, zy, zhz, xx


def residual_rows(pc: Prepared, beta_all: np.ndarray) -> np.ndarray:
    """Residuals ``y − X b`` of every row slot, (R, n); zero where a row is absent
    (its outcome and regressors are zero). ``beta_all`` has one entry per design
    column (zero for dropped columns)."""
    n = pc.n
    return np.concatenate([(y - (_flat_x(x) @ beta_all).reshape(n, -1)).T
                           for y, x in zip(pc.y, pc.x)])


@dataclass(frozen=True)
class MomentPlan:
    """How the rows of ``G' = C (ZT ∘ E)`` are formed without the sparse product.

    Per-period instruments give most instrument columns one entry, and the entries
    of one block that feed consecutive columns are consecutive: a *run*
    ``(row_lo, row_hi, entry_lo, slot)`` writes ``G'[row_lo:row_hi] = ZT[entry_lo:…] ∘
    E[slot]`` in one product, straight into ``G'``. ``extras``: the further entries
    of columns with several (an exogenous regressor, a time effect), added in the
    order the sparse product adds them; ``empty``: columns with no entry (zero)."""

    runs: tuple
    extras: tuple
    empty: np.ndarray
    rows: int


def moment_plan(scatter: sparse.csr_matrix, layout: Layout, offset: int = 0) -> MomentPlan | None:
    """The :class:`MomentPlan` of the 0/1 matrix ``scatter`` (its columns are the
    entries ``offset …``), or None when it is not a 0/1 matrix."""
    csr = sparse.csr_matrix(scatter)
    if csr.nnz and not np.all(csr.data == 1.0):
        return None
    slot_of = layout.ent_slot
    firsts, extras, empty = [], [], []
    for r in range(csr.shape[0]):
        ents = csr.indices[csr.indptr[r]:csr.indptr[r + 1]] + offset
        if not len(ents):
            empty.append(r)
            continue
        firsts.append((r, int(ents[0])))
        extras += [(r, int(e), int(slot_of[e])) for e in ents[1:]]
    runs = []
    for r, e in firsts:
        if runs:
            r0, r1, e0, slot = runs[-1]
            if r == r1 and e == e0 + (r1 - r0) and slot_of[e] == slot:
                runs[-1] = (r0, r1 + 1, e0, slot)
                continue
        runs.append((r, r + 1, e, int(slot_of[e])))
    return MomentPlan(tuple(runs), tuple(extras), np.asarray(empty, dtype=np.intp),
                      csr.shape[0])


def unit_moments_t(pc: Prepared, layout: Layout, resid: np.ndarray,
                   scatter: sparse.csr_matrix, buf: np.ndarray | None = None,
                   entries: tuple[int, int] | None = None,
                   plan: MomentPlan | None = None) -> np.ndarray:
    """Per-unit moment vectors as columns, ``G' = [g_1 … g_n]`` with ``g_i = Z_i' e_i``,
    restricted to the instrument columns of ``scatter`` (rows of ``C``): (L_kept, n).

    ``buf`` (W, n), when given, receives the entry-wise products (it is reused across
    coefficient vectors, so a pass allocates it once per chunk). ``entries = (lo,
    hi)``: only the entries ``lo:hi`` feed the columns of ``scatter``, whose columns
    are then those entries (the instruments of one equation: its blocks are
    contiguous); only the blocks that hold them are multiplied. ``plan``: the
    :func:`moment_plan` of ``scatter``, which forms ``G'`` row run by row run
    (no entry-wise scratch, no sparse product; the same sums)."""
    if plan is not None:
        ZT = pc.ZT
        out = np.empty((plan.rows, pc.n))
        for r0, r1, e0, slot in plan.runs:
            np.multiply(ZT[e0:e0 + (r1 - r0)], resid[slot], out=out[r0:r1])
        if plan.empty.size:
            out[plan.empty] = 0.0
        for r, e, slot in plan.extras:
            out[r] += ZT[e] * resid[slot]
        return out
    if buf is None:
        buf = np.empty_like(pc.ZT)
    lo_e, hi_e = (0, layout.W) if entries is None else entries
    ZT = pc.ZT
    for j, slot in enumerate(layout.block_slot):
        lo, hi = layout.starts[j], layout.stops[j]
        if hi <= lo_e or lo >= hi_e:
            continue
        np.multiply(ZT[lo:hi], resid[slot], out=buf[lo:hi])
    return np.asarray(scatter @ (buf if entries is None else buf[lo_e:hi_e]))


def windmeijer_term(pc: Prepared, layout: Layout, gt_prev: np.ndarray, a: np.ndarray,
                    a_all: np.ndarray, scatter: sparse.csr_matrix,
                    keep_x: np.ndarray, buf: np.ndarray | None = None) -> np.ndarray:
    """One chunk's ``T = Σ_i ∂(g_i g_i')/∂b · a`` of Windmeijer (2005), (L_kept, K_kept).

    With ``q_ik = Z_i' x_ik`` and ``g_i`` the moments at the previous estimate,
    column ``k`` is ``Σ_i q_ik (g_i'a) + g_i (q_ik'a)``. The first part is a
    unit-weighted ``Z'X`` (weights ``c_i = g_i'a``): per block ``(ZT_b ∘ c) X_t``.
    The second needs ``(Q_k a)_i = Σ_rows x_irk (z_ir'a)``, an (n, K) array built
    from the per-row sums ``h_r = a_b' ZT_b``, then ``G'(Q a)``. No n × L × K or
    L × L × K array is formed: the cost is O(n·W·K). ``a`` is given on the kept
    instrument columns (the rows of ``scatter``) and, as ``a_all``, spread over all
    the design's columns. ``buf`` (W, n) is scratch for ``ZT ∘ c``.
    """
    K, P, n = layout.K, layout.P, pc.n
    c = gt_prev.T @ a
    a_ent = a_all[layout.ent_col]
    part = np.empty((layout.W, K))
    h = np.zeros((layout.R, n))
    ZT = pc.ZT
    zc = np.multiply(ZT, c, out=buf) if buf is not None else ZT * c
    for j, slot in enumerate(layout.block_slot):
        lo, hi = layout.starts[j], layout.stops[j]
        e, t = divmod(int(slot), P)
        part[lo:hi] = zc[lo:hi] @ pc.x[e][:, t, :]
        h[slot] = a_ent[lo:hi] @ ZT[lo:hi]
    first = np.asarray(scatter @ part)
    qa = sum(np.einsum("pn,npk->nk", h[e * P:(e + 1) * P], x) for e, x in enumerate(pc.x))
    out = first + gt_prev @ qa
    return out[:, keep_x]


class ARSums:
    """Arellano & Bond (1991, eq. (8)) sums of one coefficient vector, for m = 1, 2.

    On the differenced level residuals ``u = Δy − Δx b`` (consecutive complete
    periods) and ``w_t = u_{t-m}``: ``Σ s_i``, ``Σ s_i²`` (``s_i = Σ_t w_it u_it``),
    ``Σ w'ΔX``, ``Σ g_i s_i`` and the number of pairs.
    """

    def __init__(self, L: int, K: int):
        self.acc = {m: {"s": 0.0, "s2": 0.0, "wx": np.zeros(K), "gs": np.zeros(L), "pairs": 0}
                    for m in (1, 2)}

    def add(self, pc: Prepared, beta_all: np.ndarray, keep_x: np.ndarray,
            gt: np.ndarray, diffs=None) -> None:
        """Add one chunk; ``diffs`` is ``pc.level_differences()`` when already at hand."""
        dy, dx, dmask = pc.level_differences() if diffs is None else diffs
        n, P = dy.shape
        u = np.where(dmask, dy - (_flat_x(dx) @ beta_all).reshape(n, P), 0.0)
        for m in (1, 2):
            if P <= m:
                continue
            pair = dmask[:, m:] & dmask[:, :-m]
            w = np.where(pair, u[:, :-m], 0.0)
            s = (w * u[:, m:]).sum(axis=1)
            acc = self.acc[m]
            acc["s"] += float(s.sum())
            acc["s2"] += float(s @ s)
            acc["wx"] += np.einsum("np,npk->k", w, dx[:, m:])[keep_x]
            acc["gs"] += gt @ s
            acc["pairs"] += int(pair.sum())
