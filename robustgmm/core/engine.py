"""The passes over the units: chunks within a memory budget and the moment sums.

A :class:`MomentEngine` runs passes over chunks of units whose size follows a
memory budget (:func:`memory_budget`), keeping the prepared chunks between passes
only while they all fit in half the budget (DEVELOPERS.md, "Where time goes"). Its
first pass sums ``Z'X``, ``Z'y``, ``Z'HZ`` and ``X'X`` (:func:`.moments.first_moments`);
when the model has time effects, ``Σ_i A_i'A_i`` of the time-effect moments written
as functions of the level residuals (:meth:`.design.Design.time_gram`, from the
distinct patterns of complete periods, not a pass) tells which time moments are
redundant. Later passes run tasks (per-unit
moments, the Windmeijer term, the AR(m) sums) per chunk, sharing residuals and
``G'`` between the tasks of a pass.
"""
from __future__ import annotations

import math
import os

import numpy as np

from .design import Design
from .linalg import independent_columns
from .moments import Layout, first_moments, prepare, residual_rows, unit_moments_t

DEFAULT_MEMORY_MB = 1024
MEMORY_ENV = "ROBUSTGMM_MEMORY_MB"
#: Largest working set of one chunk: about the size of a processor's last-level
#: cache, so that the several passes of a kernel over a chunk's arrays hit the
#: cache (measured: 20–25% faster than chunks of hundreds of MB; 24–48 MB alike).
CHUNK_WORKING_BYTES = 48 * 2**20


def memory_budget(memory_mb: float | None = None) -> int:
    """The memory budget in bytes: ``memory_mb``, else ``$ROBUSTGMM_MEMORY_MB``, else
    :data:`DEFAULT_MEMORY_MB`. A value that is not a positive number is an error."""
    source = "memory_mb"
    if memory_mb is None:
        env = os.environ.get(MEMORY_ENV)
        if env not in (None, ""):
            source = MEMORY_ENV
            try:
                memory_mb = float(env)
            except ValueError:
                memory_mb = math.nan
        else:
            memory_mb = DEFAULT_MEMORY_MB
    if not (isinstance(memory_mb, (int, float)) and math.isfinite(memory_mb) and memory_mb > 0):
        raise ValueError(f"{source} must be a positive number of megabytes, not {memory_mb!r}")
    return int(memory_mb * 2**20)


class ChunkSource:
    """Yields the design's chunks of units in kernel layout (:mod:`.moments`).

    Chunk size: the smaller of a quarter of the memory budget and
    :data:`CHUNK_WORKING_BYTES`, divided by the bytes one unit needs while its chunk
    is built and passed over. Prepared chunks are kept between
    passes while the kept ones fit in half the budget; the others are rebuilt on
    each pass. Either way the core's arrays stay within the budget, whatever the
    number of units.
    """

    def __init__(self, design: Design, layout: Layout, chunk_units: int | None = None,
                 budget: int | None = None):
        self.design = design
        self.layout = layout
        budget = memory_budget() if budget is None else int(budget)
        N = design.panel.n_units
        prepared, working = layout.bytes_per_unit(len(design.extra_terms))
        if chunk_units is None:
            chunk_units = max(1, min(budget // 4, CHUNK_WORKING_BYTES) // working)
        self.chunk_units = max(1, min(int(chunk_units), max(N, 1)))
        self.ranges = [(lo, min(lo + self.chunk_units, N)) for lo in range(0, N, self.chunk_units)]
        self.budget = budget
        self.cache_limit = budget // 2
        self.cached_bytes = 0
        self.builds = 0
        self._cache: dict[int, object] = {}

    @property
    def keep(self) -> bool:
        """Whether every chunk is kept between passes (after the first pass)."""
        return len(self._cache) == len(self.ranges)

    def __iter__(self):
        for pos, (lo, hi) in enumerate(self.ranges):
            pc = self._cache.get(pos)
            if pc is None:
                pc = prepare(self.design.chunk(lo, hi, blocks=False), self.layout)
                self.builds += 1
                size = pc.nbytes
                if self.cached_bytes + size <= self.cache_limit:
                    self._cache[pos] = pc
                    self.cached_bytes += size
            yield pc


class PassContext:
    """Per-chunk memo of one pass: residual rows per coefficient vector and
    ``G'`` per (problem, coefficient vector), so that family members that need the
    same arrays compute them once."""

    def __init__(self, pc, layout, kept=None):
        self.pc = pc
        self.layout = layout
        self._resid: dict = {}
        self._gt: dict = {}
        self._kept = kept  # the engine's G' of this chunk kept from earlier passes
        self._diffs = None
        self._buf = None  # scratch for the entry-wise products, reused within the pass

    def resid(self, beta_all):
        key = beta_all.tobytes()
        out = self._resid.get(key)
        if out is None:
            out = self._resid[key] = residual_rows(self.pc, beta_all)
        return out

    def scratch(self):
        """A (W, n) scratch array, allocated once per chunk and pass."""
        if self._buf is None:
            self._buf = np.empty_like(self.pc.ZT)
        return self._buf

    def level_differences(self):
        if self._diffs is None:
            self._diffs = self.pc.level_differences()
        return self._diffs

    def gt(self, prob, beta):
        key = (prob.serial, beta.tobytes())
        out = self._gt.get(key)
        if out is None and self._kept is not None:
            out = self._kept.get(key)
        if out is None:
            out = unit_moments_t(self.pc, self.layout, self.resid(prob.beta_all(beta)),
                                 prob.scatter, self.scratch(), plan=prob.moment_plan)
            if self._kept is not None:
                self._kept.offer(key, out)
        self._gt[key] = out
        return out


class KeptMoments:
    """``G'`` arrays kept from one pass to the next, per chunk, within a byte limit.

    The two-step fit's final pass needs the one-step ``G'`` (the Windmeijer term,
    at ``b₁``) that the weight's pass computed; kept, it is not computed twice. Keyed
    by (the problem's serial number, coefficient vector): holding the problem itself
    would close a reference cycle (problem → engine → kept arrays → problem) that only
    the cyclic garbage collector breaks, so a finished fit's arrays would outlive it."""

    def __init__(self, limit: int):
        self.limit = limit
        self.nbytes = 0
        self._chunks: dict = {}

    def chunk(self, pos: int) -> "KeptChunk":
        return KeptChunk(self, self._chunks.setdefault(pos, {}))


class KeptChunk:
    def __init__(self, owner: KeptMoments, store: dict):
        self.owner, self.store = owner, store

    def get(self, key):
        return self.store.get(key)

    def offer(self, key, gt: np.ndarray) -> None:
        if self.owner.nbytes + gt.nbytes <= self.owner.limit:
            gt.flags.writeable = False  # shared between passes: never changed in place
            self.store[key] = gt
            self.owner.nbytes += gt.nbytes


class MomentEngine:
    """Chunked passes over the units of one design (the widest of a family)."""

    def __init__(self, design: Design, chunk_units: int | None = None,
                 memory_mb: float | None = None):
        self.design = design
        self.layout = Layout(design)
        self.source = ChunkSource(design, self.layout, chunk_units, memory_budget(memory_mb))
        # G' kept between passes: within an eighth of the budget (the kept chunks
        # take up to half)
        self.kept = KeptMoments(self.source.budget // 8)
        self.passes = 0
        self._first = None
        self._time_gram = None
        self.time_cols = design.time_columns()
        self._keep_x = None
        self._independent: dict = {}

    def first(self):
        """``Z'X``, ``Z'y``, ``Z'HZ`` (every design column) and ``X'X``, summed once."""
        if self._first is None:
            lay = self.layout
            zx = np.zeros((lay.L, lay.K)); zy = np.zeros(lay.L)
            zhz = np.zeros((lay.L, lay.L)); xx = np.zeros((lay.K, lay.K))
            tcols = self.time_cols
            for pc in self.source:
                a, b, c, e = first_moments(pc, lay)
                zx += a; zy += b; zhz += c; xx += e
            self.passes += 1
            self._first = (zx, zy, zhz, xx)
            self._time_gram = (self.design.time_gram(tcols) if len(tcols)
                               else np.zeros((0, 0)))
        return self._first

    def time_gram(self) -> np.ndarray:
        """``Σ_i A_i'A_i`` over the time-effect columns ``time_cols`` (see the module
        docstring); empty without time effects."""
        self.first()
        return self._time_gram

    def keep_x(self) -> np.ndarray:
        if self._keep_x is None:
            self._keep_x = independent_columns(self.first()[3])
        return self._keep_x

    def independent_among(self, cols: np.ndarray) -> np.ndarray:
        """The columns ``cols`` that :func:`independent_columns` keeps on ``X'X``
        restricted to them (memoised: siblings of a family ask the same)."""
        key = tuple(int(c) for c in cols)
        if key not in self._independent:
            xx = self.first()[3]
            self._independent[key] = cols[independent_columns(xx[np.ix_(cols, cols)])]
        return self._independent[key]

    def run_pass(self, tasks) -> None:
        """One pass over the chunks; each task is called with the chunk's context."""
        for pos, pc in enumerate(self.source):
            ctx = PassContext(pc, self.layout, self.kept.chunk(pos))
            for task in tasks:
                task(ctx)
        self.passes += 1
