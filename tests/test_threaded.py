"""The parallel kernels (``kernels/threaded.py``, ``kernels/data.py`` take_rows) against their serial forms.

Every element-wise kernel and the column sums split their work into fixed blocks, so the parallel form must give
the serial form's bits exactly (compared with ``np.array_equal`` / ``tobytes``, no tolerance). The serial forms
are themselves checked against NumPy references in ``test_kernels.py`` and ``test_optimizers.py``. Shapes with
ragged last blocks and odd column counts; blocks both of the dispatch's size and tiny (many blocks).
"""

from __future__ import annotations

import threading

import numpy as np
import pytest
from shardmill.kernels import activations as act
from shardmill.kernels import data as data_kernels
from shardmill.kernels import dispatch, optim, threaded


@pytest.fixture
def two_threads():
    dispatch.use_threads(2)
    yield
    dispatch.use_threads(1)


def draws(shape, dtype, seed):
    return np.random.default_rng(seed).normal(size=shape).astype(dtype)


@pytest.mark.parametrize("dtype", [np.float32, np.float64])
@pytest.mark.parametrize("code", [act.RELU, act.TANH, act.GELU, act.IDENTITY])
@pytest.mark.parametrize("shape,rows", [((513, 300), 7), ((256, 1024), 8)])
def test_bias_forward_and_backward_blocks_match_the_serial_kernels(dtype, code, shape, rows):
    Z0, b, D0 = draws(shape, dtype, 1), draws(shape[1], dtype, 2), draws(shape, dtype, 3)
    Zs, As = Z0.copy(), np.empty_like(Z0)
    act.bias_forward(Zs, b, As, code)
    Zp, Ap = Z0.copy(), np.empty_like(Z0)
    threaded.activation_blocks(Zp, b, Ap, Zp, code, rows, False)
    assert Zs.tobytes() == Zp.tobytes() and As.tobytes() == Ap.tobytes()  # the same bits (fixed blocks)
    Ds, Dp = D0.copy(), D0.copy()
    act.backward(Zs, As, Ds, code)
    threaded.activation_blocks(Zs, b, As, Dp, code, rows, True)
    assert Ds.tobytes() == Dp.tobytes()


@pytest.mark.parametrize("bad_row", [None, 0, 37, 511])
def test_take_rows_blocks_match_the_serial_kernel(bad_row):
    X = draws((2000, 96), np.float64, 5)
    rows = np.random.default_rng(6).permutation(2000)[:512].astype(np.int64)
    X[rows[-1], 0] = np.inf  # the last row: the first non-finite one must win
    if bad_row is not None:
        X[rows[bad_row], 3] = np.nan
    mean, inv_std = X[np.isfinite(X).all(axis=1)].mean(axis=0), np.full(96, 0.5)
    serial, blocks = np.zeros((512, 96), np.float32), np.zeros((512, 96), np.float32)
    first = data_kernels.take_rows_serial(X, rows, mean, inv_std, serial)
    assert data_kernels.take_rows_blocks(X, rows, mean, inv_std, blocks, 13) == first
    assert serial.tobytes() == blocks.tobytes()
    assert first == (511 if bad_row is None else bad_row)  # X[rows[-1]] holds inf in every case


@pytest.mark.parametrize("dtype", [np.float32, np.float64])
@pytest.mark.parametrize("method", ["sgd", "momentum", "nesterov", "adam"])
def test_optimizer_blocks_match_the_serial_kernels(dtype, method, two_threads):
    n = 3 * dispatch.MIN_ELEMENTS + 77  # above the threshold, a ragged last block
    params, grads, s1, s2 = (draws(n, dtype, seed) for seed in (7, 8, 9, 10))
    s2 = np.abs(s2)  # Adam's v ≥ 0
    serial, par = [a.copy() for a in (params, s1, s2)], [a.copy() for a in (params, s1, s2)]
    calls = {"sgd": (optim.sgd, threaded.sgd, lambda p, a, b: (p, grads, 0.01, 1e-4)),
             "momentum": (optim.momentum, threaded.momentum, lambda p, a, b: (p, grads, a, 0.01, 0.9, 1e-4)),
             "nesterov": (optim.nesterov, threaded.nesterov, lambda p, a, b: (p, grads, a, 0.01, 0.9, 1e-4)),
             "adam": (optim.adam, threaded.adam,
                      lambda p, a, b: (p, grads, a, b, 1e-3, 0.9, 0.999, 1e-8, 3.0, 0.0, 1e-5))}
    plain, dispatched, arguments = calls[method]
    assert dispatch.parallel(n)  # the dispatched call takes the parallel form
    plain(*arguments(*serial))
    dispatched(*arguments(*par))
    for a, b in zip(serial, par, strict=True):
        assert a.tobytes() == b.tobytes()


def test_dispatch_stays_serial_below_the_threshold_and_off_the_main_thread(two_threads):
    assert dispatch.parallel(dispatch.MIN_ELEMENTS) and not dispatch.parallel(dispatch.MIN_ELEMENTS - 1)
    seen = []
    worker = threading.Thread(target=lambda: seen.append(dispatch.parallel(10 * dispatch.MIN_ELEMENTS)))
    worker.start()
    worker.join()
    assert seen == [False]  # exact mode's lanes: kernels serial on their own threads
    dispatch.use_threads(1)
    assert not dispatch.parallel(10 * dispatch.MIN_ELEMENTS)


def test_dispatched_row_kernels_match_the_serial_kernels_above_the_threshold(two_threads):
    Z0, b, D0 = draws((512, 1024), np.float32, 11), draws(1024, np.float32, 12), draws((512, 1024), np.float32, 13)
    assert dispatch.parallel(Z0.size)
    Zs, As, Ds = Z0.copy(), np.empty_like(Z0), D0.copy()
    act.bias_forward(Zs, b, As, act.RELU)
    act.backward(Zs, As, Ds, act.RELU)
    Zp, Ap, Dp = Z0.copy(), np.empty_like(Z0), D0.copy()
    threaded.bias_forward(Zp, b, Ap, act.RELU)
    threaded.backward(Zp, Ap, Dp, act.RELU)
    assert As.tobytes() == Ap.tobytes() and Ds.tobytes() == Dp.tobytes()
    serial, par = np.empty(1024, np.float32), np.empty(1024, np.float32)
    act.column_sums(Ds, serial)
    threaded.column_sums(Dp, par)
    assert serial.tobytes() == par.tobytes()


@pytest.mark.parametrize("dtype", [np.float32, np.float64])
@pytest.mark.parametrize("code", [act.RELU, act.TANH, act.IDENTITY])
@pytest.mark.parametrize("shape", [(512, 1024), (700, 513), (3, 5), (1, 1024), (96, 20000)])
def test_fused_backward_and_bias_gradient_match_numpy_and_have_one_set_of_bits(dtype, code, shape, two_threads):
    """D ← f'(Z) ⊙ D and db = Σ_rows D in one pass over fixed blocks: against NumPy's elementwise product and
    ``np.sum(axis=0)`` in float64 (the textbook bias gradient, common practice), and bit for bit between the serial
    form and the threaded one (blocks fixed by the shape, joined in block order)."""
    Z0, b, D0 = draws(shape, dtype, 21), draws(shape[1], dtype, 22), draws(shape, dtype, 23)
    Z, A = Z0.copy(), np.empty_like(Z0)
    act.bias_forward(Z, b, A, code)
    derivative = {act.RELU: (Z > 0).astype(np.float64), act.TANH: 1.0 - A.astype(np.float64) ** 2,
                  act.IDENTITY: np.ones(shape)}[code]
    expected = derivative * D0.astype(np.float64)
    Ds, dbs = D0.copy(), np.full(shape[1], np.nan, dtype)
    rows = threaded.sum_rows(*shape)
    act.backward_sums(Z, A, Ds, code, rows, np.empty((-(-shape[0] // rows), shape[1]), dtype), dbs)
    tol = 1e-5 if dtype == np.float32 else 1e-12
    np.testing.assert_allclose(Ds, expected, rtol=tol, atol=tol)
    np.testing.assert_allclose(dbs, expected.sum(axis=0), rtol=tol, atol=tol * np.abs(expected).sum(axis=0).max())
    Dp, dbp = D0.copy(), np.full(shape[1], np.nan, dtype)
    assert dispatch.parallel(Z.size) == (Z.size >= dispatch.MIN_ELEMENTS)
    scratch = np.full(threaded.MAX_SUM_BLOCKS * shape[1], np.nan, dtype)
    threaded.backward_sums(Z, A, Dp, code, dbp, scratch)  # threaded for the large shapes, serial for the small
    assert Ds.tobytes() == Dp.tobytes() and dbs.tobytes() == dbp.tobytes()
    Dq, dbq = D0.copy(), np.empty(shape[1], dtype)
    partial = np.empty((-(-shape[0] // rows), shape[1]), dtype)
    threaded.backward_sums_blocks(Z, A, Dq, code, rows, partial, dbq)  # forced threaded form, any size
    assert dbs.tobytes() == dbq.tobytes()


def test_fused_backward_of_no_rows_gives_a_zero_bias_gradient():
    """An empty sum is 0 (common practice): a shard or chunk of no rows adds nothing to the bias gradient."""
    Z = np.zeros((0, 4), np.float32)
    db = np.full(4, np.nan, np.float32)
    threaded.backward_sums(Z, Z, Z.copy(), act.RELU, db, np.zeros(threaded.MAX_SUM_BLOCKS * 4, np.float32))
    assert db.tolist() == [0.0] * 4


@pytest.mark.parametrize("dtype", [np.float32, np.float64])
@pytest.mark.parametrize("n", [0, 7, 8, 9, 1000, 3 * dispatch.MIN_ELEMENTS + 77])
def test_sum_of_squares_is_within_the_recursive_summation_bound_and_has_one_set_of_bits(dtype, n, two_threads):
    """Σ x² for the global-norm clip, blocked and over the threads: within Higham's bound for a float64 sum of n
    terms, γ_(n−1)·Σ x² (Higham 2002, §4.2; the squares of float32 and float64 values are exact or one rounding
    in float64, covered by γ_n), against math.fsum (correctly rounded); the same bits on one thread and on two; a
    range's sum does not depend on where it lies."""
    import math

    x = draws(n, dtype, 31)
    exact = math.fsum(float(v) * float(v) for v in x)
    u = np.finfo(np.float64).eps / 2
    gamma = (n + 1) * u / (1 - (n + 1) * u)
    serial, par = optim.sum_squares(x), threaded.sum_squares(x)
    assert abs(serial - exact) <= gamma * exact and abs(par - exact) <= gamma * exact
    dispatch.use_threads(1)
    assert threaded.sum_squares(x) == par  # blocked on one thread: the same bits as on two
    if n > 20:
        assert optim.squares(x, 5, n - 3) == optim.sum_squares(x[5:n - 3].copy())


def test_clip_scale_blocks_match_the_serial_kernel(two_threads):
    """x ← c·x element by element (the global-norm clip, common practice): the blocks give the serial bits, with
    the factor a Python float as the clip passes it."""
    x = draws(3 * dispatch.MIN_ELEMENTS + 5, np.float32, 32)
    serial, par = x.copy(), x.copy()
    optim.scale(serial, 0.37)
    threaded.scale(par, 0.37)
    assert dispatch.parallel(x.size) and serial.tobytes() == par.tobytes()
