"""Small symmetric-matrix helpers used by the estimator (thin wrappers over numpy).

The weight matrices of GMM are inverses of sums of outer products; with many
instruments (Roodman 2009) they can be singular. We invert them with a
diagonally rescaled symmetric eigendecomposition, so that columns measured on very
different scales (dummies next to log levels) do not decide the numerical rank.
"""
from __future__ import annotations

import numpy as np


def sym_pinv(matrix: np.ndarray, rtol: float | None = None) -> tuple[np.ndarray, int]:
    """Moore–Penrose inverse of a symmetric positive semi-definite matrix and its rank.

    With ``d = diag(M)^(-1/2)``, ``M⁺ = d · (d M d)⁺ · d``; the eigenvalues of the
    rescaled matrix below ``rtol · max eigenvalue`` are treated as zero. For a
    non-singular matrix this is the ordinary inverse.
    """
    m = np.asarray(matrix, dtype=float)
    size = m.shape[0]
    if size == 0:
        return np.zeros((0, 0)), 0
    diag = np.diag(m).copy()
    scale = np.where(diag > 0, 1.0 / np.sqrt(np.where(diag > 0, diag, 1.0)), 0.0)
    scaled = m * scale[:, None] * scale[None, :]
    scaled = 0.5 * (scaled + scaled.T)
    vals, vecs = np.linalg.eigh(scaled)
    top = vals.max() if vals.size else 0.0
    if rtol is None:
        rtol = size * np.finfo(float).eps * 10
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


def solve_sym(matrix: np.ndarray, rhs: np.ndarray) -> np.ndarray:
    """Solve ``M x = rhs`` for a symmetric positive definite ``M`` (falls back to the
    pseudo-inverse when ``M`` is singular)."""
    try:
        return np.linalg.solve(matrix, rhs)
    except np.linalg.LinAlgError:
        return sym_pinv(matrix)[0] @ rhs
