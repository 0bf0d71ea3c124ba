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


def sym_pinv(matrix: np.ndarray, rtol: float | None = None) -> tuple[np.ndarray, int]:
    """Moore–Penrose inverse of a symmetric positive semi-definite matrix and its rank.

    With ``d = diag(M)^(-1/2)``, ``M⁺ = d · (d M d)⁺ · d``; the eigenvalues of the
    rescaled matrix below ``rtol · max eigenvalue`` are treated as zero. For a
    non-singular matrix this is the ordinary inverse (computed from a Cholesky
    factor when the matrix is well conditioned, see the module docstring).
    """
    m = np.asarray(matrix, dtype=float)
    size = m.shape[0]
    if size == 0:
        return np.zeros((0, 0)), 0
    diag = np.diag(m).copy()
    scale = np.where(diag > 0, 1.0 / np.sqrt(np.where(diag > 0, diag, 1.0)), 0.0)
    scaled = m * scale[:, None] * scale[None, :]
    scaled = 0.5 * (scaled + scaled.T)
    if rtol is None:
        rtol = size * np.finfo(float).eps * 10
    if np.all(diag > 0):
        inv_scaled = _cholesky_inverse(scaled, CHOLESKY_MARGIN * size * rtol)
        if inv_scaled is not None:
            inv = inv_scaled * scale[:, None] * scale[None, :]
            return 0.5 * (inv + inv.T), size
    vals, vecs = np.linalg.eigh(scaled)
    top = vals.max() if vals.size else 0.0
    keep = vals > rtol * top if top > 0 else np.zeros_like(vals, dtype=bool)
    inv_scaled = (vecs[:, keep] / vals[keep]) @ vecs[:, keep].T
    inv = inv_scaled * scale[:, None] * scale[None, :]
    return 0.5 * (inv + inv.T), int(keep.sum())


def independent_columns(gram: np.ndarray, rtol: float = 1e-9) -> np.ndarray:
    """Indices of the columns kept when a Gram matrix ``X'X`` is scanned in order.

    Column ``j`` is kept when its residual sum of squares after projection on the
    columns already kept exceeds ``rtol · X_j'X_j``; an all-zero column is dropped.
    This keeps the earliest columns, so regressors listed first win over dummies.
    """
    kept: list[int] = []
    for j in range(gram.shape[0]):
        own = gram[j, j]
        if not own > 0:
            continue
        if kept:
            sub = gram[np.ix_(kept, kept)]
            cross = gram[kept, j]
            coef = np.linalg.lstsq(sub, cross, rcond=None)[0]
            resid = own - cross @ coef
        else:
            resid = own
        if resid > rtol * own:
            kept.append(j)
    return np.asarray(kept, dtype=int)


def inverse_or_pinv(matrix: np.ndarray) -> np.ndarray:
    """Inverse of a small symmetric positive semi-definite matrix: from a Cholesky
    factor of the diagonally rescaled matrix when that is well conditioned, else the ordinary inverse when
    ``numpy.linalg.matrix_rank`` finds full rank, else :func:`sym_pinv`."""
    m = np.asarray(matrix, dtype=float)
    size = m.shape[0]
    if size == 0:
        return np.zeros((0, 0))
    rtol = size * np.finfo(float).eps * 10
    diag = np.diag(m)
    if np.all(diag > 0):
        scale = 1.0 / np.sqrt(diag)
        scaled = m * scale[:, None] * scale[None, :]
        inv = _cholesky_inverse(0.5 * (scaled + scaled.T), CHOLESKY_MARGIN * size * rtol)
        if inv is not None:
            return inv * scale[:, None] * scale[None, :]
    if np.linalg.matrix_rank(m) < size:
        return sym_pinv(m)[0]
    return np.linalg.inv(m)


def solve_sym(matrix: np.ndarray, rhs: np.ndarray) -> np.ndarray:
    """Solve ``M x = rhs`` for a symmetric positive definite ``M`` (falls back to the
    pseudo-inverse when ``M`` is singular)."""
    try:
        return np.linalg.solve(matrix, rhs)
    except np.linalg.LinAlgError:
        return sym_pinv(matrix)[0] @ rhs
