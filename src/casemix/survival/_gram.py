"""Weighted cross-products X^T diag(v) X in row blocks, and weighted sums over row groups.

numpy has no BLAS call for a diagonally weighted Gram matrix; forming ``X * v[:, None]`` at
once would double peak memory at registry scale (n = 10^6, p = 20 is 160 MB per copy), so the
product is taken over blocks of rows, each one BLAS call.
"""

from __future__ import annotations

import numpy as np
from scipy import sparse

BLOCK_ROWS = 65_536


def weighted_gram(X: np.ndarray, v: np.ndarray, center: np.ndarray | None = None) -> np.ndarray:
    """Return sum_i v_i (x_i - c)(x_i - c)^T.

    Parameters
    ----------
    X : ndarray, shape (n, p)
    v : ndarray, shape (n,)
        Row weights.
    center : ndarray, shape (p,), optional
        Subtracted from every row first (default: nothing).

    Returns
    -------
    ndarray, shape (p, p)
    """
    p = X.shape[1]
    out = np.zeros((p, p))
    for start in range(0, X.shape[0], BLOCK_ROWS):
        block = X[start : start + BLOCK_ROWS]
        if center is not None:
            block = block - center
        out += (block * v[start : start + BLOCK_ROWS, None]).T @ block
    return out


def weighted_variance(X: np.ndarray, w: np.ndarray, center: np.ndarray) -> np.ndarray:
    """Return the weighted variance of each column about ``center``, shape (p,)."""
    out = np.zeros(X.shape[1])
    for start in range(0, X.shape[0], BLOCK_ROWS):
        block = X[start : start + BLOCK_ROWS] - center
        out += w[start : start + BLOCK_ROWS] @ (block * block)
    return out / w.sum()


def weighted_group_sums(
    X: np.ndarray, v: np.ndarray, starts: np.ndarray, rows: np.ndarray | None = None
) -> np.ndarray:
    """Return the sums of v_k x_rows[k] over consecutive groups of k beginning at ``starts``.

    Done as one sparse (groups x rows) by dense product, which reads X once and needs no
    weighted or reordered copy of it.

    Parameters
    ----------
    X : ndarray, shape (n, p)
    v : ndarray, shape (m,)
        Weights, in the order of ``rows``.
    starts : ndarray of int, shape (g,)
        Position in ``rows`` where each group begins, ascending, starting at 0.
    rows : ndarray of int, shape (m,), optional
        Rows of X in group order (default: 0 .. n - 1, so m = n).

    Returns
    -------
    ndarray, shape (g, p)
    """
    rows = np.arange(X.shape[0]) if rows is None else rows
    indptr = np.append(starts, rows.size)
    groups = sparse.csr_matrix((v, rows, indptr), shape=(starts.size, X.shape[0]))
    return np.asarray(groups @ X)
