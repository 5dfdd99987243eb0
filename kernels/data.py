"""Row gathering: copy (and standardise) the rows of one shard into the batch buffer.

:func:`take_rows` runs on threads for large batches (the rule: ``dispatch.py``), with the serial form's bits.
"""

from __future__ import annotations

import math

import numpy as np
from numba import njit, prange
from shardmill.kernels.dispatch import parallel, row_block


@njit(cache=True, nogil=True)
def take_rows_serial(X, rows, mean, inv_std, out):
    """out[i] = (X[rows[i]] − mean) · inv_std; returns the index i of the first non-finite row, or −1.

    X: (N, d) any float dtype (often a memory map); rows: (n,) int64; mean, inv_std: (d,) float64;
    out: (≥ n, d) batch buffer in the model's dtype.
    """
    bad = -1
    d = X.shape[1]
    for i in range(rows.size):
        r = rows[i]
        for j in range(d):
            x = X[r, j]
            if bad < 0 and not math.isfinite(x):
                bad = i
            out[i, j] = (x - mean[j]) * inv_std[j]
    return bad


@njit(cache=True, nogil=True, parallel=True)
def take_rows_blocks(X, rows, mean, inv_std, out, block):
    """:func:`take_rows_serial` on blocks of ``block`` rows; the first non-finite row over the blocks in
    block order (−1: none)."""
    n = rows.size
    blocks = (n + block - 1) // block
    bad = np.full(blocks, -1, dtype=np.int64)
    for k in prange(blocks):
        lo = k * block
        hi = min(n, lo + block)
        first = take_rows_serial(X, rows[lo:hi], mean, inv_std, out[lo:hi])
        if first >= 0:
            bad[k] = lo + first
    for k in range(blocks):
        if bad[k] >= 0:
            return bad[k]
    return -1


def take_rows(X: np.ndarray, rows: np.ndarray, mean: np.ndarray, inv_std: np.ndarray, out: np.ndarray) -> int:
    """out[i] = (X[rows[i]] − mean)·inv_std; the first non-finite row or −1 (:func:`take_rows_serial`)."""
    if parallel(rows.size * out.shape[1]):
        return int(take_rows_blocks(X, rows, mean, inv_std, out, row_block(out.shape[1])))
    return int(take_rows_serial(X, rows, mean, inv_std, out))
