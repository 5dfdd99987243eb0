"""Row gathering: copy (and standardise) the rows of one shard into the batch buffer."""

from __future__ import annotations

import math

from numba import njit


@njit(cache=True, nogil=True)
def take_rows(X, rows, mean, inv_std, out):
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
