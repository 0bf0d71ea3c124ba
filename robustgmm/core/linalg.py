"""Small symmetric-matrix helpers used by the estimator (thin wrappers over numpy).

The weight matrices of GMM are inverses of sums of outer products; with many
instruments (Roodman 2009) they can be singular. We invert them after a diagonal
rescaling, so that columns measured on very different scales (dummies next to log
levels) do not decide the numerical rank: first by a Cholesky factorisation
(LAPACK ``potrf``/``potri``, about 1/30 of the work of an eigendecomposition), kept
only when LAPACK's condition estimate (``pocon``) shows the matrix is far from
singular; otherwise by the symmetric eigendecomposition, which decides the rank.
"""
from __future__ import annotations

import numpy as np
from scipy.linalg import lapack

#: A Cholesky inverse is used when the reciprocal 1-norm condition estimate exceeds
#: ``CHOLESKY_MARGIN · size · rtol``. The 1-norm and 2-norm condition numbers differ
#: by at most a factor ``size``, so a matrix accepted here has every eigenvalue far
#: above the ``rtol`` cut of the eigendecomposition: both paths give the ordinary
#: inverse, and only matrices near that cut take the slower, rank-revealing path.
CHOLESKY_MARGIN = 100.0


def _cholesky_inverse(m: np.ndarray, min_rcond: float) -> np.ndarray | None:
    """Inverse of a symmetric positive definite ``m`` from its Cholesky factor, or
    None when ``m`` is not positive definite or its condition estimate is too large."""
    size = m.shape[0]
    anorm = float(np.abs(m).sum(axis=0).max())
    if not np.isfinite(anorm) or anorm <= 0:
        return None
    factor, info = lapack.dpotrf(m, lower=False, clean=True)
    if info != 0:
        return None
    rcond, info = lapack.dpocon(factor, anorm)  # upper factor (default uplo "U")
    if info != 0 or not rcond > min_rcond:
        return None
    inv, info = lapack.dpotri(factor, lower=False)
    if info != 0:
        return None
    upper = np.triu(inv)
    return upper + np.triu(inv, 1).T if size else upper


def sym_pinv(matrix: np.ndarray, rtol: float | None = None,
             scale: np.ndarray | None = None) -> tuple[np.ndarray, int]:
    """A generalised inverse of a symmetric positive semi-definite matrix, and its rank.

    With ``d = diag(M)^(-1/2)`` (or the given ``scale`` vector ``d``),
    ``M⁻ = d · (d M d)⁺ · d``; the eigenvalues of the rescaled matrix below
    ``rtol · max eigenvalue`` are treated as zero. Rescaling first makes the result
    and the rank independent of the units of the rows and columns. For a
    non-singular matrix this is the ordinary inverse whatever ``d`` (computed from a
    Cholesky factor when the matrix is well conditioned, see the module docstring).
    A fixed ``scale`` (one that does not depend on the matrix) makes the map
    ``M ↦ M⁻`` differentiable with the formula of Golub & Pereyra (1973) at
    constant rank, which the Windmeijer correction needs (:mod:`.covariance`).
    """
    m = np.asarray(matrix, dtype=float)
    size = m.shape[0]
    if size == 0:
        return np.zeros((0, 0)), 0
    diag = np.diag(m).copy()
    if scale is None:
        scale = _unit_diagonal_scale(diag)
    scaled = _symmetric(rescale(m, scale))
    rtol = _default_rtol(size) if rtol is None else rtol
    if np.all(diag > 0):
        inv_scaled = _cholesky_inverse(scaled, CHOLESKY_MARGIN * size * rtol)
        if inv_scaled is not None:
            return _symmetric(rescale(inv_scaled, scale)), size
    vals, vecs, keep = _eigen_cut(scaled, rtol)
    inv_scaled = (vecs[:, keep] / vals[keep]) @ vecs[:, keep].T
    return _symmetric(rescale(inv_scaled, scale)), int(keep.sum())


def scaled_pinv_parts(matrix: np.ndarray, scale: np.ndarray, rtol: float | None = None):
    """``(M̂⁺, P̂⊥)`` of the rescaled ``M̂ = d M d`` (``d`` = ``scale``): its
    Moore–Penrose inverse (same eigenvalue cut as :func:`sym_pinv`) and the
    projector on its null space, ``I − M̂ M̂⁺``."""
    m = np.asarray(matrix, dtype=float)
    size = m.shape[0]
    vals, vecs, keep = _eigen_cut(_symmetric(rescale(m, scale)),
                                  _default_rtol(size) if rtol is None else rtol)
    pinv = (vecs[:, keep] / vals[keep]) @ vecs[:, keep].T
    null = vecs[:, ~keep] @ vecs[:, ~keep].T
    return _symmetric(pinv), _symmetric(null)


def rescale(m: np.ndarray, scale: np.ndarray) -> np.ndarray:
    """``d M d`` with ``d = diag(scale)``, elementwise (``M_ij d_i d_j``)."""
    return m * scale[:, None] * scale[None, :]


def _symmetric(m: np.ndarray) -> np.ndarray:
    """``(M + M')/2``: rounding can leave a computed symmetric matrix slightly not."""
    return 0.5 * (m + m.T)


def _default_rtol(size: int) -> float:
    """The eigenvalue cut of the pseudo-inverses: ``10 · size · machine epsilon``."""
    return size * np.finfo(float).eps * 10


def _eigen_cut(scaled: np.ndarray, rtol: float):
    """Eigenvalues, eigenvectors and which eigenvalues count as non-zero (above
    ``rtol`` times the largest) of a symmetric matrix."""
    vals, vecs = np.linalg.eigh(scaled)
    top = vals.max() if vals.size else 0.0
    keep = vals > rtol * top if top > 0 else np.zeros_like(vals, dtype=bool)
    return vals, vecs, keep


def _unit_diagonal_scale(diag: np.ndarray) -> np.ndarray:
    """``diag^(-1/2)`` where positive, 0 elsewhere (a zero row stays zero)."""
    positive = diag > 0
    return np.where(positive, 1.0 / np.sqrt(np.where(positive, diag, 1.0)), 0.0)


#: In :func:`independent_columns`, a column whose residual, computed from the running
#: inverse of the kept columns' Gram, exceeds this is kept without a least-squares
#: solve. Six orders of magnitude above the scan's cut: while every kept column had a
#: residual this large, the inverse is well conditioned and its rounding (far below
#: this margin) cannot move a column across the cut, so the kept columns are those of
#: the least-squares scan; any other column is decided by that solve as before.
SCAN_FAST_RESIDUAL = 1e-3


def independent_columns(gram: np.ndarray, rtol: float = 1e-9) -> np.ndarray:
    """Indices of the columns kept when a Gram matrix ``X'X`` is scanned in order.

    Column ``j`` is kept when its residual sum of squares after projection on the
    columns already kept exceeds ``rtol · X_j'X_j``; an all-zero column is dropped.
    This keeps the earliest columns, so regressors listed first win over dummies.
    The Gram matrix is rescaled to unit diagonal first, so that the decision does
    not depend on the units of the columns (a regressor in units rather than
    millions must not change which dummies are kept).

    A residual computed from a Gram matrix carries a rounding error of about
    ``ε · κ`` (``κ`` the condition number of the kept columns' Gram matrix; Golub &
    Van Loan 2013, section 5.3.8: normal equations square the condition of the
    data). When the kept columns are themselves nearly collinear — a calendar-year
    trend beside the constant keeps only ``var(t)/mean(t)² ≈ 1e-6`` of its norm —
    that error can exceed ``rtol``, and an exactly dependent column (the last
    period dummy) would pass as independent on one machine and not on another
    (summation order). So the threshold is ``max(rtol, 100 · ε / r_min)``, with
    ``r_min`` the smallest relative residual among the kept columns (the smallest
    squared pivot of the Cholesky factor of the unit-diagonal Gram, ``≈ 1/κ``).

    The residual is ``1 − c'G⁻¹c`` (``G`` the kept columns' Gram, ``c`` their
    products with column ``j``): read from a bordered update of ``G⁻¹`` while it is
    well conditioned (:data:`SCAN_FAST_RESIDUAL`), else from a least-squares solve.
    """
    gram = np.asarray(gram, dtype=float)
    scale = _unit_diagonal_scale(np.diag(gram).copy())
    unit = rescale(gram, scale)
    kept: list[int] = []
    smallest = 1.0
    noise = 100.0 * np.finfo(float).eps
    # G⁻¹ of the kept columns while every kept residual was large; with such residuals
    # the threshold below is rtol itself (noise / smallest < rtol), for either solve
    inv = None
    fast_ok = rtol > 2.0 * noise / SCAN_FAST_RESIDUAL
    for j in range(unit.shape[0]):
        if not scale[j] > 0:
            continue
        if not kept:
            kept.append(j)  # residual 1
            inv = np.array([[1.0 / unit[j, j]]]) if fast_ok and unit[j, j] > 0 else None
            continue
        cross = unit[kept, j]
        if inv is not None:
            w = inv @ cross
            fast = 1.0 - cross @ w
            if fast > max(SCAN_FAST_RESIDUAL, 1e3 * rtol):
                # the inverse of [[G, c], [c', 1]] from G⁻¹ (Schur complement ``fast``)
                k = len(kept)
                grown = np.empty((k + 1, k + 1))
                grown[:k, :k] = inv + np.outer(w, w) / fast
                grown[:k, k] = grown[k, :k] = -w / fast
                grown[k, k] = 1.0 / fast
                inv = grown
                kept.append(j)
                smallest = min(smallest, fast)
                continue
        sub = unit[np.ix_(kept, kept)]
        coef = np.linalg.lstsq(sub, cross, rcond=None)[0]
        resid = 1.0 - cross @ coef
        if resid > max(rtol, noise / smallest):
            kept.append(j)
            smallest = min(smallest, resid)
            inv = None  # a nearly dependent column kept: the solve decides from here
    return np.asarray(kept, dtype=int)


def identified_columns(cross: np.ndarray, row_scale: np.ndarray, col_scale: np.ndarray,
                       rtol: float = 1e-8) -> np.ndarray:
    """Boolean mask of the columns of ``Z'X`` that add to its rank, scanned in order.

    The rank condition of GMM identification is ``rank(Z'X) = K`` (Hansen 1982;
    Hayashi 2000, section 3.2). ``Z'X`` is first rescaled, ``D_z Z'X D_x`` with
    ``row_scale``/``col_scale`` the reciprocal root sums of squares of the
    instrument and regressor columns, so that the decision is free of units; column
    ``j`` counts as identified when its component orthogonal to the earlier
    identified columns has norm above ``rtol`` times its own norm (a Householder QR
    without pivoting in the given order: ``|R_jj| / ||M_j||``).
    """
    m = np.asarray(cross, dtype=float) * row_scale[:, None] * col_scale[None, :]
    K = m.shape[1]
    if K == 0:
        return np.zeros(0, dtype=bool)
    norms = np.sqrt((m * m).sum(axis=0))
    ok = np.zeros(K, dtype=bool)
    if m.shape[0] >= K:
        r = np.linalg.qr(m, mode="r")
        ok = np.abs(np.diag(r)) > rtol * np.where(norms > 0, norms, np.inf)
        if ok.all():
            return ok
    # some column adds nothing: scan again against the identified columns only, so
    # that a dependent column's rounding residue does not enter the later projections
    kept: list[int] = []
    for j in range(K):
        if not norms[j] > 0:
            continue
        col = m[:, j]
        if kept:
            basis = m[:, kept]
            coef = np.linalg.lstsq(basis, col, rcond=None)[0]
            resid = float(np.linalg.norm(col - basis @ coef))
        else:
            resid = float(norms[j])
        if resid > rtol * norms[j]:
            kept.append(j)
    out = np.zeros(K, dtype=bool)
    out[kept] = True
    return out


def inverse_or_pinv(matrix: np.ndarray) -> np.ndarray:
    """Inverse of a small symmetric positive semi-definite matrix, always through the
    diagonally rescaled matrix (so that units do not decide anything): from its
    Cholesky factor when that is well conditioned, else its ordinary inverse when
    ``numpy.linalg.matrix_rank`` finds it of full rank, else :func:`sym_pinv`."""
    m = np.asarray(matrix, dtype=float)
    size = m.shape[0]
    if size == 0:
        return np.zeros((0, 0))
    rtol = _default_rtol(size)
    diag = np.diag(m).copy()
    if not np.all(diag > 0):
        return sym_pinv(m)[0]
    scale = 1.0 / np.sqrt(diag)
    scaled = _symmetric(rescale(m, scale))
    inv = _cholesky_inverse(scaled, CHOLESKY_MARGIN * size * rtol)
    if inv is None:
        if np.linalg.matrix_rank(scaled) < size:
            return sym_pinv(m)[0]
        inv = np.linalg.inv(scaled)
    return rescale(inv, scale)
