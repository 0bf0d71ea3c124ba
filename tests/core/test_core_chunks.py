"""The chunked, block-structured kernels against a plain dense computation.

The reference here builds, for every unit, the dense stacked matrices ``Z_i``
(rows: transformed then level equation, one per calendar period; columns: every
instrument), ``X_i``, ``y_i`` and the one-step weight ``H_i`` (Arellano & Bond 1991:
2 on the diagonal of differenced rows, -1 between rows of consecutive periods,
identity for deviations and levels) and sums the textbook products unit by unit:
``Σ Z_i'X_i``, ``Σ Z_i'H_i Z_i``, ``S = Σ g_i g_i'`` with ``g_i = Z_i'e_i``, the
Windmeijer (2005) term ``T[:, k] = Σ_i q_ik (g_i'a) + g_i (q_ik'a)`` with
``q_ik = Z_i'x_ik``, and the Arellano–Bond (1991, eq. (8)) AR(m) sums. The core's
chunked sums (kernel layout, sparse scatter, per-block products) must give the same
numbers to 1e-10 for every chunk size: one unit per chunk, sizes that leave a short
last chunk, and chunks that split nothing.

Also: :func:`robustgmm.core.fit_family` equals separate fits (exactly when the
specs differ in steps and errors), :func:`share_key` groups what can be shared, and
the Cholesky path of :func:`sym_pinv` keeps the rank semantics of the
eigendecomposition.
"""
from __future__ import annotations

import dataclasses

import numpy as np
import pytest

from helpers_core import sim_panel, sim_spec
from robustgmm.core import GMMProblem, fit, fit_family, invalid_reason, share_key
from robustgmm.errors import InputError
from robustgmm.core.design import LEVEL, TRANSFORMED
from robustgmm.core.engine import ChunkSource
from robustgmm.core.linalg import sym_pinv
from robustgmm.data import panel_from_frame
from robustgmm.errors import EstimationError
from robustgmm.spec import Regressor

TOL = dict(rtol=1e-10, atol=1e-10)


def _holed_panel(n_units=23, n_periods=8, seed=3):
    """A simulated panel with gaps (calendar holes) and a unit that starts late."""
    df, _ = sim_panel(n_units, n_periods, seed=seed)
    drop = ((df.unit == 2) & (df.period == 2004)) | ((df.unit == 5) & (df.period <= 2003)) \
        | ((df.unit == 9) & (df.period == 2006)) | ((df.unit == 11) & (df.period == 2002))
    df = df[~drop].copy()
    df.loc[(df.unit == 7) & (df.period == 2005), "x"] = np.nan  # a missing value, not a gap
    return panel_from_frame(df, "unit", "period", ["y", "x", "w"])


def _dense_units(prob):
    """Per-unit dense arrays from one design chunk of the whole panel:
    Z (N, R, L), X (N, R, K), y (N, R), H (N, R, R), plus the chunk."""
    d = prob.design
    N, P = d.panel.n_units, d.P
    ch = d.chunk(0, N)
    R = 2 * P
    Z = np.zeros((N, R, d.L_all))
    for block, vals in ch.blocks:
        Z[:, block.equation * P + block.t, block.cols] = vals
    X = np.concatenate([ch.x[TRANSFORMED], ch.x[LEVEL]], axis=1)
    y = np.concatenate([ch.y[TRANSFORMED], ch.y[LEVEL]], axis=1)
    present = np.concatenate([ch.rows[TRANSFORMED], ch.rows[LEVEL]], axis=1)
    H = np.zeros((N, R, R))
    fd = not d.fod
    for t in range(P):
        H[:, t, t] = np.where(present[:, t], 2.0 if fd else 1.0, 0.0)
        H[:, P + t, P + t] = present[:, P + t]
        if fd and t + 1 < P:
            both = present[:, t] & present[:, t + 1]
            H[:, t, t + 1] = H[:, t + 1, t] = -1.0 * both
    Z = Z[:, :, d.keep_z]
    X = X[:, :, d.keep_x]
    return Z, X, y, H, ch


def _dense_ar(ch, beta, keep_x, G):
    """Arellano & Bond (1991, eq. (8)) sums, written out plainly."""
    xlev = ch.xlev[:, :, keep_x]
    elev = np.where(ch.complete, ch.ylev - xlev @ beta, 0.0)
    N, P = elev.shape
    out = {}
    for m in (1, 2):
        s = np.zeros(N)
        wx = np.zeros(len(keep_x))
        pairs = 0
        for i in range(N):
            for t in range(m + 1, P):
                ok = all(ch.complete[i, t - j] and ch.complete[i, t - j - 1] for j in (0, m))
                if not ok:
                    continue
                u_t = elev[i, t] - elev[i, t - 1]
                u_l = elev[i, t - m] - elev[i, t - m - 1]
                s[i] += u_l * u_t
                wx += u_l * (xlev[i, t] - xlev[i, t - 1])
                pairs += 1
        out[m] = {"s": s.sum(), "s2": s @ s, "wx": wx, "gs": G.T @ s, "pairs": pairs}
    return out


SPECS = [
    dict(equations="system", transform="fd", form="per-period", time_effects=True),
    dict(equations="system", transform="fod", form="collapsed", time_effects=True),
    dict(equations="difference", transform="fd", form="per-period", time_effects=False,
         last_lag=3),
    dict(equations="difference", transform="fod", form="per-period", time_effects=True),
    dict(equations="system", transform="fd", form="collapsed", time_effects=False,
         regressors=(Regressor("x", (0, 1), "predetermined"), Regressor("w", (0,), "exogenous"))),
    # two outcome lags and an extra instrument column (non-contiguous regressor views)
    dict(equations="system", transform="fod", form="per-period", time_effects=True,
         outcome_lags=(1, 2), regressors=(Regressor("x", (0,), "endogenous"),),
         extra_instruments=("w",), last_lag=4),
]


@pytest.mark.parametrize("kw", SPECS, ids=lambda kw: "-".join(str(v) for v in kw.values())[:40])
def test_chunked_sums_equal_dense_computation(kw):
    panel = _holed_panel()
    N = panel.n_units
    spec = sim_spec(**kw)
    ref = GMMProblem(spec, panel, chunk_units=N)
    Z, X, y, H, ch = _dense_units(ref)
    # first moments
    zx = np.einsum("nrl,nrk->lk", Z, X)
    zy = np.einsum("nrl,nr->l", Z, y)
    zhz = np.einsum("nrl,nrs,nsm->lm", Z, H, Z)
    rng = np.random.default_rng(0)
    b_prev = ref.one_step()[0]
    beta = b_prev + 0.05 * rng.normal(size=b_prev.size)
    e_prev = y - X @ b_prev
    e = y - X @ beta
    G_prev = np.einsum("nrl,nr->nl", Z, e_prev)
    G = np.einsum("nrl,nr->nl", Z, e)
    S = G_prev.T @ G_prev
    ssr = float((e_prev[:, :ref.design.P] ** 2).sum())
    weight = np.linalg.pinv(S)
    a = weight @ (zy - zx @ beta)  # the vector of the Windmeijer term: W Z'e at the estimate
    Q = np.einsum("nrl,nrk->nlk", Z, X)
    T = np.einsum("nlk,n->lk", Q, G_prev @ a) + G_prev.T @ np.einsum("nlk,l->nk", Q, a)
    ar = _dense_ar(ch, beta, ref.design.keep_x, G)
    for chunk in sorted({1, 2, 5, N - 1, N, N + 7}):
        prob = GMMProblem(spec, panel, chunk_units=chunk)
        assert len(prob.source.ranges) == -(-N // min(chunk, N))
        np.testing.assert_allclose(prob.zx, zx, **TOL)
        np.testing.assert_allclose(prob.zy, zy, **TOL)
        np.testing.assert_allclose(prob.zhz, zhz, **TOL)
        S_c, ssr_c = prob.unit_moments_at(b_prev)
        np.testing.assert_allclose(S_c, S, **TOL)
        assert ssr_c == pytest.approx(ssr, rel=1e-10)
        T_c, ar_c = prob.final_pass(beta, b_prev, weight, True)
        np.testing.assert_allclose(T_c, T, **TOL)
        for m in (1, 2):
            assert ar_c[m]["pairs"] == ar[m]["pairs"]
            for name in ("s", "s2"):
                assert ar_c[m][name] == pytest.approx(ar[m][name], rel=1e-10, abs=1e-10)
            np.testing.assert_allclose(ar_c[m]["wx"], ar[m]["wx"], **TOL)
            np.testing.assert_allclose(ar_c[m]["gs"], ar[m]["gs"], **TOL)


def test_memory_budget_sets_chunks_and_results_do_not_move():
    """A tiny budget gives many small chunks, of which only those that fit in half
    the budget are kept between passes; the others are rebuilt on every pass. The
    fit equals the one-chunk fit to 1e-10."""
    panel = _holed_panel(40, 8, seed=9)
    spec = sim_spec(time_effects=True)
    ref = fit(spec, panel, chunk_units=panel.n_units)
    small = GMMProblem(spec, panel, memory_mb=0.1)
    src = small.source
    assert isinstance(src, ChunkSource)
    n_chunks, kept = len(src.ranges), len(src._cache)
    assert n_chunks > 3 and 0 < kept < n_chunks and not src.keep
    assert src.cached_bytes <= src.cache_limit
    small.unit_moments_at(small.one_step()[0])
    assert src.builds == n_chunks + (n_chunks - kept)  # the first pass, then the rest again
    big = GMMProblem(spec, panel, memory_mb=512)
    assert len(big.source.ranges) == 1 and big.source.keep
    res = fit(spec, panel, memory_mb=0.1)
    np.testing.assert_allclose(res.params, ref.params, **TOL)
    np.testing.assert_allclose(res.std_errors, ref.std_errors, **TOL)
    for name in ("ar1", "ar2", "sargan", "hansen"):
        assert res.tests[name].statistic == pytest.approx(ref.tests[name].statistic, rel=1e-9, nan_ok=True)


def test_memory_budget_must_be_positive(monkeypatch):
    _, panel = sim_panel(30, 6, seed=1)
    with pytest.raises(ValueError, match="memory_mb"):
        fit(sim_spec(), panel, memory_mb=0)
    monkeypatch.setenv("ROBUSTGMM_MEMORY_MB", "lots")
    with pytest.raises(ValueError, match="ROBUSTGMM_MEMORY_MB"):
        fit(sim_spec(), panel)


def _same(a, b, exact=True):
    cmp = np.testing.assert_array_equal if exact else (
        lambda x, y: np.testing.assert_allclose(x, y, rtol=1e-9, atol=1e-12))
    cmp(a.params, b.params)
    cmp(a.std_errors, b.std_errors)
    assert a.std_error_kind == b.std_error_kind
    assert a.counts == b.counts
    assert a.warnings == b.warnings
    assert set(a.difference_hansen) == set(b.difference_hansen)
    stats = [(a.tests[k], b.tests[k]) for k in ("ar1", "ar2", "sargan", "hansen")]
    stats += [(a.difference_hansen[g], b.difference_hansen[g]) for g in a.difference_hansen]
    for x, y in stats:
        assert (x is None) == (y is None)
        if x is not None:
            cmp(np.array([x.statistic, x.p_value]), np.array([y.statistic, y.p_value]))
            assert x.df == y.df


@pytest.mark.parametrize("equations,transform", [("system", "fd"), ("difference", "fod")])
def test_fit_family_equals_separate_fits_exactly(equations, transform):
    _, panel = sim_panel(90, 7, seed=13)
    base = sim_spec(equations=equations, transform=transform, time_effects=True)
    specs = [dataclasses.replace(base, steps=s, errors=e)
             for s in (1, 2, "iterated") for e in ("robust", "conventional")]
    assert len({share_key(s) for s in specs}) == 1
    family = fit_family(specs, panel)
    for spec, res in zip(specs, family):
        if invalid_reason(spec):  # conventional one-step system GMM: an input error
            assert isinstance(res, InputError)
            continue
        _same(res, fit(spec, panel), exact=True)


def test_fit_family_across_last_lag_equals_separate_fits():
    """Moments of a column subset are sub-blocks of the widest set's moments; the
    sums are the same terms in a different order, hence equal to rounding only."""
    _, panel = sim_panel(120, 8, seed=17)
    base = sim_spec(time_effects=True)
    specs = [dataclasses.replace(base, last_lag=lag, steps=s, form=form)
             for form in ("per-period", "collapsed") for lag in (2, 3, None) for s in (1, 2)]
    assert len({share_key(s) for s in specs}) == 2
    family = fit_family(specs, panel)
    for spec, res in zip(specs, family):
        _same(res, fit(spec, panel), exact=False)


def test_fit_family_keeps_order_and_isolates_failures():
    _, panel = sim_panel(60, 6, seed=5)
    good = sim_spec(time_effects=False)
    # collapsed difference GMM, window [2, 2]: y lag 2, x lag 2 and w instrument the four
    # terms y[t-1], x[t], x[t-1], w[t]: not identified
    bad = sim_spec(equations="difference", form="collapsed", last_lag=2, time_effects=False,
                   regressors=(Regressor("x", (0, 1), "endogenous"),
                               Regressor("w", (0,), "exogenous")))
    with pytest.raises(EstimationError) as info:
        fit(bad, panel)
    specs = [good, bad, dataclasses.replace(good, steps=1), dataclasses.replace(bad, steps=1)]
    out = fit_family(specs, panel)
    assert isinstance(out[1], EstimationError) and str(out[1]) == str(info.value)
    assert isinstance(out[3], EstimationError)
    _same(out[0], fit(good, panel))
    _same(out[2], fit(specs[2], panel))


def test_share_key_groups_only_what_can_be_shared():
    base = sim_spec()
    same = [dataclasses.replace(base, steps=1), dataclasses.replace(base, errors="conventional"),
            dataclasses.replace(base, last_lag=3), dataclasses.replace(base, focus=("y[t-1]",))]
    assert {share_key(s) for s in same} == {share_key(base)}
    other = [dataclasses.replace(base, form="collapsed"), dataclasses.replace(base, transform="fod"),
             dataclasses.replace(base, equations="difference"), dataclasses.replace(base, first_lag=3),
             dataclasses.replace(base, time_effects=not base.time_effects),
             dataclasses.replace(base, regressors=(Regressor("x", (0,), "predetermined"),))]
    keys = {share_key(s) for s in other}
    assert len(keys) == len(other) and share_key(base) not in keys


def test_sym_pinv_cholesky_path_keeps_rank_semantics():
    rng = np.random.default_rng(4)
    a = rng.normal(size=(200, 12)) * np.logspace(-3, 3, 12)  # very different column scales
    m = a.T @ a
    inv, rank = sym_pinv(m)
    assert rank == 12
    np.testing.assert_allclose(inv @ m, np.eye(12), atol=1e-8)
    # rank deficient: 12 columns spanned by 7 (as S with fewer units than instruments)
    b = rng.normal(size=(7, 12))
    s = b.T @ b
    inv, rank = sym_pinv(s)
    assert rank == 7
    np.testing.assert_allclose(s @ inv @ s, s, rtol=1e-8, atol=1e-8 * np.abs(s).max())
    # the rescaled generalized inverse d (d S d)⁺ d, as before the Cholesky path existed
    d = 1.0 / np.sqrt(np.diag(s))
    expected = d[:, None] * np.linalg.pinv(s * d[:, None] * d[None, :], hermitian=True) * d[None, :]
    np.testing.assert_allclose(inv, expected, rtol=1e-6, atol=1e-8 * np.abs(expected).max())
    # a zero column keeps rank and pseudo-inverse semantics
    z = m.copy()
    z[3, :] = z[:, 3] = 0.0
    inv, rank = sym_pinv(z)
    assert rank == 11 and np.all(inv[3] == 0)


def test_more_instruments_than_units_warns_singular_weight():
    _, panel = sim_panel(25, 9, seed=2)
    res = fit(sim_spec(time_effects=True), panel)
    assert res.counts.instruments > res.counts.units
    assert any("robust weight matrix is singular" in w for w in res.warnings)


def test_memory_does_not_grow_with_units_beyond_the_raw_data():
    """With a small memory budget the peak of the arrays a fit allocates (tracemalloc
    sees numpy's buffers) grows by less than the raw N×P data when N grows 8×: the
    chunk arrays are bounded by the budget, not by N."""
    import tracemalloc

    spec = sim_spec(time_effects=True)
    peaks, raws = [], []
    for n in (1000, 8000):
        _, panel = sim_panel(n, 8, seed=4)
        tracemalloc.start()
        fit(spec, panel, memory_mb=2)
        peaks.append(tracemalloc.get_traced_memory()[1])
        tracemalloc.stop()
        raws.append(sum(v.nbytes for v in panel.values.values()))
    assert peaks[1] - peaks[0] < raws[1] - raws[0]
    assert peaks[1] < 2 * 2**20 + raws[1]


def test_prepare_refuses_a_skipped_entry_that_is_not_zero():
    """The kernel layout skips period-dummy entries that are zero by construction
    (moments._structural_zeros) and prepare checks them on every chunk: an entry
    wrongly listed as zero (here the constant of the level equation, one in every
    level row) is an internal error, never a silently dropped moment."""
    from robustgmm.core.moments import prepare

    _, panel = sim_panel(40, 6, seed=2)
    prob = GMMProblem(sim_spec(time_effects=True), panel)
    eng = prob.engine
    d, lay = eng.design, eng.layout
    const = d.x_kinds_all.index("const")
    width = len(d.x_labels_all) + len(d.extra_terms)
    t = int(np.flatnonzero(d.row_any[LEVEL])[0])
    prepare(d.chunk(0, panel.n_units, blocks=False), lay)  # as laid out: fine
    lay.zero[LEVEL] = np.append(lay.zero.get(LEVEL, np.zeros(0, np.intp)), t * width + const)
    with pytest.raises(RuntimeError, match="assumed zero"):
        prepare(d.chunk(0, panel.n_units, blocks=False), lay)


@pytest.mark.parametrize("form,transform", [("per-period", "fd"), ("collapsed", "fod"),
                                            ("per-period", "fod")])
def test_moment_plan_gives_the_sparse_product(form, transform):
    """G' formed run by run (moments.moment_plan) equals C (ZT ∘ E), the sparse
    product it replaces, for the problem's kept columns and for one equation's
    columns (the strength sums), on a panel with gaps and time effects."""
    from robustgmm.core.moments import moment_plan, prepare, residual_rows, unit_moments_t

    panel = _holed_panel()
    prob = GMMProblem(sim_spec(form=form, transform=transform, time_effects=True), panel)
    eng = prob.engine
    pc = prepare(eng.design.chunk(0, panel.n_units, blocks=False), eng.layout)
    resid = residual_rows(pc, np.random.default_rng(3).normal(size=prob.K_all))
    assert prob.moment_plan is not None
    want = unit_moments_t(pc, eng.layout, resid, prob.scatter)
    got = unit_moments_t(pc, eng.layout, resid, prob.scatter, plan=prob.moment_plan)
    np.testing.assert_array_equal(got, want)
    level = np.flatnonzero([eng.design.z_columns[j].equation == LEVEL for j in prob.design.keep_z])
    sub = prob.scatter[level]
    lo, hi = int(sub.indices.min()), int(sub.indices.max()) + 1
    sub = sub[:, lo:hi].tocsr()
    np.testing.assert_array_equal(
        unit_moments_t(pc, eng.layout, resid, sub, plan=moment_plan(sub, eng.layout, lo)),
        unit_moments_t(pc, eng.layout, resid, sub, entries=(lo, hi)))
