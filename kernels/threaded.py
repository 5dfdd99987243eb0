"""The element-wise kernels over T threads, with the serial kernels' bits: fixed blocks, Numba's parallel loops.

Each parallel kernel cuts its arrays into blocks whose size does not depend on T and runs the serial kernel
(``activations``, ``optim``; ``data.take_rows`` has its own) on each block in a ``prange`` loop. Element-wise
work (bias + activation, its backward, the optimizer updates, taking rows) gives every element the same operations
whichever block it lies in, so **every parallel kernel has the bits of its serial form for any T**
(``tests/test_threaded.py``). A hidden layer's bias gradient is formed with its activation's backward
(:func:`backward_sums`): each block's column sums while the block is in cache, joined in block order, so it too
has one set of bits for every T. The output layer's and the normed layers' column sums stay serial
(:func:`column_sums`: a parallel form over whole columns was slower than one thread). take_rows' first
non-finite row is the first over the blocks, read in block order.

Dispatch (the plain functions below; the rule is ``dispatch.py``'s): the serial kernel when this process runs one
kernel thread (``dispatch.use_threads``), when the array has fewer than ``dispatch.MIN_ELEMENTS`` elements
(launching threads costs more than they save there), or when the caller is not the main thread (exact mode's lanes
run whole chunks on threads of their own and their kernels stay serial: only the main thread starts a parallel
loop).

Threading layer and thread count: ``dispatch.py``.
"""

from __future__ import annotations

import numpy as np
from numba import njit, prange
from shardmill.kernels import activations, optim
from shardmill.kernels.dispatch import BLOCK_ELEMENTS, parallel, row_block, threads

SUM_BLOCK_ELEMENTS = 16384
"""Values per block of the fused activation backward and bias gradient (64 KiB of float32: a block's sums are
formed while it is in cache; 32 blocks of a (512, 1024) delta, whose partial sums cost 1/16 of the pass to join)."""

MAX_SUM_BLOCKS = 64
"""At most this many blocks per fused bias gradient: a wide layer's blocks hold more rows, so the block sums (the
workspace's scratch, MAX_SUM_BLOCKS × width) stay small against the delta and cheap to join."""

# --- the parallel forms: each runs the serial kernel on fixed blocks --------------------------------------------

@njit(cache=True, nogil=True, parallel=True)
def activation_blocks(Z, b, A, D, code, rows, backward):
    """On blocks of ``rows`` rows: :func:`activations.bias_forward` (Z, b, A; D unread) or, with ``backward``,
    :func:`activations.backward` (Z, A, D; D in place, b unread). One driver for both: one specialisation fewer."""
    n = Z.shape[0]
    for k in prange((n + rows - 1) // rows):
        lo = k * rows
        hi = min(n, lo + rows)
        if backward:
            activations.backward(Z[lo:hi], A[lo:hi], D[lo:hi], code)
        else:
            activations.bias_forward(Z[lo:hi], b, A[lo:hi], code)


@njit(cache=True, nogil=True, parallel=True)
def backward_sums_blocks(Z, A, D, code, rows, partial, db):
    """:func:`activations.backward_sums` with its blocks over the threads; the join stays in block order."""
    for k in prange(partial.shape[0]):
        activations.backward_block(Z, A, D, code, rows, k, partial)
    activations.add_blocks(partial, db)


@njit(cache=True, nogil=True, parallel=True)
def sgd_blocks(params, grads, lr, l2):
    n = params.size
    for k in prange((n + BLOCK_ELEMENTS - 1) // BLOCK_ELEMENTS):
        lo = k * BLOCK_ELEMENTS
        hi = min(n, lo + BLOCK_ELEMENTS)
        optim.sgd(params[lo:hi], grads[lo:hi], lr, l2)


@njit(cache=True, nogil=True, parallel=True)
def momentum_blocks(params, grads, velocity, lr, mu, l2, nesterov):
    n = params.size
    for k in prange((n + BLOCK_ELEMENTS - 1) // BLOCK_ELEMENTS):
        lo = k * BLOCK_ELEMENTS
        hi = min(n, lo + BLOCK_ELEMENTS)
        if nesterov:
            optim.nesterov(params[lo:hi], grads[lo:hi], velocity[lo:hi], lr, mu, l2)
        else:
            optim.momentum(params[lo:hi], grads[lo:hi], velocity[lo:hi], lr, mu, l2)


@njit(cache=True, nogil=True, parallel=True)
def adam_blocks(params, grads, m, v, lr, beta1, beta2, eps, step, l2, decay):
    n = params.size
    for k in prange((n + BLOCK_ELEMENTS - 1) // BLOCK_ELEMENTS):
        lo = k * BLOCK_ELEMENTS
        hi = min(n, lo + BLOCK_ELEMENTS)
        optim.adam(params[lo:hi], grads[lo:hi], m[lo:hi], v[lo:hi], lr, beta1, beta2, eps, step, l2, decay)


@njit(cache=True, nogil=True, parallel=True)
def squares_blocks(x, block, out):
    """:func:`optim.block_sum_squares` with its blocks over the threads (each block's sum alone: the same bits)."""
    n = x.size
    for b in prange(out.size):
        chunk = x[b * block:min((b + 1) * block, n)]
        out[b] = optim.squares(chunk, 0, chunk.size)


@njit(cache=True, nogil=True, parallel=True)
def scale_blocks(x, factor):
    n = x.size
    for k in prange((n + BLOCK_ELEMENTS - 1) // BLOCK_ELEMENTS):
        lo = k * BLOCK_ELEMENTS
        optim.scale(x[lo:min(n, lo + BLOCK_ELEMENTS)], factor)


# --- dispatch: the same arguments as the serial kernels ------------------------------------------------------------

def bias_forward(Z: np.ndarray, b: np.ndarray, A: np.ndarray, code: int) -> None:
    """Z += b, A = f(Z) (``activations.bias_forward``); Z, A: (n, m), b: (m,)."""
    if parallel(Z.size):
        activation_blocks(Z, b, A, Z, code, row_block(Z.shape[1]), False)
    else:
        activations.bias_forward(Z, b, A, code)


def backward(Z: np.ndarray, A: np.ndarray, D: np.ndarray, code: int) -> None:
    """D ← f'(Z) ⊙ D (``activations.backward``); Z, A, D: (n, m)."""
    if parallel(Z.size):
        activation_blocks(Z, Z[0], A, D, code, row_block(Z.shape[1]), True)
    else:
        activations.backward(Z, A, D, code)


def backward_sums(Z: np.ndarray, A: np.ndarray, D: np.ndarray, code: int, db: np.ndarray,
                  scratch: np.ndarray) -> None:
    """D ← f'(Z) ⊙ D and db = Σ_rows D, fused (``activations.backward_sums``); Z, A, D: (n, m), db: (m,).
    ``scratch``: (≥ MAX_SUM_BLOCKS · m,) in D's dtype, for the blocks' sums (the workspace's: nothing is allocated
    in the step). Blocks of :func:`sum_rows` rows: the same bits on one thread and on many."""
    n, m = Z.shape
    rows = sum_rows(n, m)
    blocks = -(-n // rows)
    if n == 0:
        db[:] = 0
        return
    partial = scratch[:blocks * m].reshape(blocks, m)
    if parallel(Z.size):
        backward_sums_blocks(Z, A, D, code, rows, partial, db)
    else:
        activations.backward_sums(Z, A, D, code, rows, partial, db)


def sum_rows(n: int, columns: int) -> int:
    """Rows per block of :func:`backward_sums` for an (n, columns) delta: :data:`SUM_BLOCK_ELEMENTS` values of whole
    rows, but never more than :data:`MAX_SUM_BLOCKS` blocks (wide layers). The shape alone decides, never T, so
    the sums' bits do not depend on the thread count."""
    return max(1, SUM_BLOCK_ELEMENTS // max(columns, 1), -(-n // MAX_SUM_BLOCKS))


def column_sums(dZ: np.ndarray, db: np.ndarray) -> None:
    """db_j = Σ_i dZ[i, j] (``activations.column_sums``); dZ: (n, m), db: (m,). Serial at every thread count:
    a parallel form over blocks of whole columns (same bits) ran 2.5-2.8x *slower* on two threads than this on one,
    at (512, 1024), (2048, 1024) and (4096, 4096) float32 (``benchmarks/kernel_threads.py``): the row loop is one
    streaming pass that a second thread only splits into two half-width ones."""
    activations.column_sums(dZ, db)


def sgd(params: np.ndarray, grads: np.ndarray, lr: float, l2: float) -> None:
    """``optim.sgd``, over the threads for large arrays."""
    if parallel(params.size):
        sgd_blocks(params, grads, lr, l2)
    else:
        optim.sgd(params, grads, lr, l2)


def momentum(params: np.ndarray, grads: np.ndarray, velocity: np.ndarray, lr: float, mu: float, l2: float) -> None:
    """``optim.momentum``, over the threads for large arrays."""
    if parallel(params.size):
        momentum_blocks(params, grads, velocity, lr, mu, l2, False)
    else:
        optim.momentum(params, grads, velocity, lr, mu, l2)


def nesterov(params: np.ndarray, grads: np.ndarray, velocity: np.ndarray, lr: float, mu: float, l2: float) -> None:
    """``optim.nesterov``, over the threads for large arrays."""
    if parallel(params.size):
        momentum_blocks(params, grads, velocity, lr, mu, l2, True)
    else:
        optim.nesterov(params, grads, velocity, lr, mu, l2)


def adam(params: np.ndarray, grads: np.ndarray, m: np.ndarray, v: np.ndarray, lr: float, beta1: float,
         beta2: float, eps: float, step: int, l2: float, decay: float) -> None:
    """``optim.adam``, over the threads for large arrays."""
    if parallel(params.size):
        adam_blocks(params, grads, m, v, lr, beta1, beta2, eps, step, l2, decay)
    else:
        optim.adam(params, grads, m, v, lr, beta1, beta2, eps, step, l2, decay)


def block_sum_squares(x: np.ndarray, block: int, out: np.ndarray) -> None:
    """out[b] = Σ x_i² over block b of ``block`` elements (``optim.block_sum_squares``); x: (n,), out:
    (⌈n / block⌉,) float64."""
    if parallel(x.size):
        squares_blocks(x, block, out)
    else:
        optim.block_sum_squares(x, block, out)


def sum_squares(x: np.ndarray) -> float:
    """Σ x_i² in float64 (the square of the global gradient norm): blocks of :data:`BLOCK_ELEMENTS` summed alone
    (over the threads for large arrays), then joined in block order; the same bits for every T. x: (n,)."""
    out = np.empty(-(-x.size // BLOCK_ELEMENTS))
    block_sum_squares(x, BLOCK_ELEMENTS, out)
    return float(optim.ordered_sum(out))


def scale(x: np.ndarray, factor: float) -> None:
    """x ← factor·x in place (``optim.scale``: the global-norm clip), over the threads for large arrays."""
    if parallel(x.size):
        scale_blocks(x, factor)
    else:
        optim.scale(x, factor)


def warm_up(dtype: np.dtype) -> None:
    """Compile (or load from Numba's cache) the parallel forms for ``dtype`` when kernels run on threads."""
    if threads() < 2:
        return
    Z = np.zeros((2, 2), dtype=dtype)
    b = np.zeros(2, dtype=dtype)
    activation_blocks(Z, b, Z, Z, activations.RELU, 1, False)
    activation_blocks(Z, b, Z, Z.copy(), activations.RELU, 1, True)
    backward_sums_blocks(Z, Z, Z.copy(), activations.RELU, 1, np.zeros((2, 2), dtype=dtype), b)
    flat = np.zeros(4, dtype=dtype)
    squares_blocks(flat, 2, np.zeros(2))
    scale_blocks(flat, 1.0)  # a Python float, as the clip passes it
