"""Sums over units of small matrix products, batched over chunks of units.

Every quantity of the estimator is a sum over units ``i`` of ``Z_i' H Z_i``,
``Z_i' X_i``, ``Z_i' y_i`` or of per-unit moment vectors ``g_i = Z_i' e_i``. A
chunk's instruments are stored row by row (one block per equation and calendar
period, holding only that row's columns), so per-period instruments cost what
their non-zero blocks cost, not what the dense stacked matrix would.
"""
from __future__ import annotations

import numpy as np

from .design import LEVEL, TRANSFORMED, Chunk


def first_moments(chunk: Chunk, L: int, K: int, fd_weight: bool):
    """``Z'X``, ``Z'y``, ``X'X`` (stacked equations) and ``Z'HZ`` of one chunk.

    ``H`` is the one-step weight of Arellano & Bond (1991): for first differences
    the tridiagonal matrix with 2 on the diagonal and -1 next to it (the covariance
    of differenced i.i.d. errors up to σ²), for forward orthogonal deviations and the
    level equation the identity (Arellano & Bover 1995; Blundell & Bond 1998).
    Rows of consecutive calendar periods are neighbours; a gap breaks the band.
    """
    zx = np.zeros((L, K))
    zy = np.zeros(L)
    zhz = np.zeros((L, L))
    xx = np.zeros((K, K))
    for eq in (TRANSFORMED, LEVEL):
        x = chunk.x[eq].reshape(-1, K)
        y = chunk.y[eq].reshape(-1)
        xx += x.T @ x
    by_row = {}
    for block, vals in chunk.blocks:
        x_t = chunk.x[block.equation][:, block.t, :]
        y_t = chunk.y[block.equation][:, block.t]
        zx[block.cols] += vals.T @ x_t
        zy[block.cols] += vals.T @ y_t
        diag = 2.0 if (block.equation == TRANSFORMED and fd_weight) else 1.0
        zhz[np.ix_(block.cols, block.cols)] += diag * (vals.T @ vals)
        by_row[(block.equation, block.t)] = (block, vals)
    if fd_weight:
        for (eq, t), (block, vals) in by_row.items():
            if eq != TRANSFORMED or (eq, t + 1) not in by_row:
                continue
            nblock, nvals = by_row[(eq, t + 1)]
            cross = vals.T @ nvals
            zhz[np.ix_(block.cols, nblock.cols)] -= cross
            zhz[np.ix_(nblock.cols, block.cols)] -= cross.T
    return zx, zy, zhz, xx


def residuals(chunk: Chunk, beta: np.ndarray, keep_x: np.ndarray):
    """Residuals ``y - X b`` of both equations, zero where a row is absent."""
    out = []
    for eq in (TRANSFORMED, LEVEL):
        e = chunk.y[eq] - chunk.x[eq][:, :, keep_x] @ beta
        out.append(np.where(chunk.rows[eq], e, 0.0))
    return out


def unit_moments(chunk: Chunk, resid, L: int, keep_z: np.ndarray) -> np.ndarray:
    """Per-unit moment vectors ``g_i = Z_i' e_i`` as an (n, L_kept) array."""
    g = np.zeros((chunk.n, L))
    for block, vals in chunk.blocks:
        g[:, block.cols] += vals * resid[block.equation][:, block.t, None]
    return g[:, keep_z]


def unit_instrument_regressor(chunk: Chunk, L: int, keep_z, keep_x) -> np.ndarray:
    """Per-unit ``Z_i' X_i`` as an (n, L_kept, K_kept) array (for the Windmeijer terms)."""
    K = len(keep_x)
    q = np.zeros((chunk.n, L, K))
    for block, vals in chunk.blocks:
        x_t = chunk.x[block.equation][:, block.t, :][:, keep_x]
        q[:, block.cols, :] += vals[:, :, None] * x_t[:, None, :]
    return q[:, keep_z, :]
