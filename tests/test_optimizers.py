"""shardmill.training.optim (Optimizer, learning_rate) against the published algorithms, recomputed here in NumPy.

Sources: Kingma & Ba 2015 (Adam, Algorithm 1); Loshchilov & Hutter 2019 (AdamW, Algorithm 2); Sutskever, Martens,
Dahl & Hinton 2013 (classical and Nesterov momentum, eq. 1–4); Loshchilov & Hutter 2017 (SGDR cosine annealing,
eq. 5, here without restarts); linear warm-up after Goyal et al. 2017. Every reference runs in float64 on the same
random gradients as the optimizer under test.
"""

from __future__ import annotations

import math
import os
import platform
import subprocess
import sys
from dataclasses import replace

import numpy as np
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st
from shardmill.config import OptimizerSpec
from shardmill.training.optim import STATE_NAMES, Optimizer, learning_rate

N = 37
STEPS = 12


def run(spec: OptimizerSpec, theta0: np.ndarray, gradients: list[np.ndarray], dtype=np.float64,
        total_steps: int = STEPS) -> tuple[np.ndarray, list[float]]:
    """Apply the optimizer to theta0 with a fixed sequence of gradients; returns θ and the learning rates used."""
    opt = Optimizer(spec, theta0.size, np.dtype(dtype))
    params = theta0.astype(dtype)
    rates = [opt.step(params, g.astype(dtype), total_steps) for g in gradients]
    return params, rates


def data(seed: int = 0) -> tuple[np.ndarray, list[np.ndarray]]:
    rng = np.random.default_rng(seed)
    return rng.standard_normal(N), [rng.standard_normal(N) for _ in range(STEPS)]


def schedule_multipliers(spec: OptimizerSpec, total: int) -> list[float]:
    return [learning_rate(spec, t, total) / spec.learning_rate for t in range(STEPS)]


@pytest.mark.parametrize("schedule", ["constant", "cosine"])
def test_adam_matches_kingma_ba_algorithm_1(schedule):
    spec = OptimizerSpec(method="adam", learning_rate=0.01, beta1=0.9, beta2=0.999, eps=1e-8, schedule=schedule,
                         warmup=2)
    theta, grads = data(1)
    got, rates = run(spec, theta, grads)
    # Kingma & Ba 2015, Algorithm 1, with α_t = α·η_t
    m, v, th = np.zeros(N), np.zeros(N), theta.copy()
    for t, g in enumerate(grads, start=1):
        m = spec.beta1 * m + (1 - spec.beta1) * g
        v = spec.beta2 * v + (1 - spec.beta2) * g * g
        m_hat = m / (1 - spec.beta1**t)
        v_hat = v / (1 - spec.beta2**t)
        th = th - rates[t - 1] * m_hat / (np.sqrt(v_hat) + spec.eps)
    np.testing.assert_allclose(got, th, rtol=1e-12, atol=1e-14)


def test_adam_with_coupled_l2_adds_lambda_theta_to_the_gradient():
    spec = OptimizerSpec(method="adam", learning_rate=0.01, weight_decay=0.05)
    theta, grads = data(2)
    got, _ = run(spec, theta, grads)
    # Loshchilov & Hutter 2019, Algorithm 2 with the L2 term in line 6 (g ← ∇f + λθ) and none in line 12
    m, v, th = np.zeros(N), np.zeros(N), theta.copy()
    for t, g0 in enumerate(grads, start=1):
        g = g0 + spec.weight_decay * th
        m = spec.beta1 * m + (1 - spec.beta1) * g
        v = spec.beta2 * v + (1 - spec.beta2) * g * g
        th = th - spec.learning_rate * (m / (1 - spec.beta1**t)) / (np.sqrt(v / (1 - spec.beta2**t)) + spec.eps)
    np.testing.assert_allclose(got, th, rtol=1e-12, atol=1e-14)


@pytest.mark.parametrize("schedule", ["constant", "cosine", "step"])
def test_adamw_matches_loshchilov_hutter_algorithm_2(schedule):
    spec = OptimizerSpec(method="adamw", learning_rate=0.02, weight_decay=0.1, schedule=schedule, warmup=3,
                         step_every=4, step_factor=0.5)
    theta, grads = data(3)
    got, _ = run(spec, theta, grads)
    eta = schedule_multipliers(spec, STEPS)  # η_t: the schedule multiplier
    alpha, lam = spec.learning_rate, spec.weight_decay
    m, v, th = np.zeros(N), np.zeros(N), theta.copy()
    for t, g in enumerate(grads, start=1):
        m = spec.beta1 * m + (1 - spec.beta1) * g
        v = spec.beta2 * v + (1 - spec.beta2) * g * g
        m_hat, v_hat = m / (1 - spec.beta1**t), v / (1 - spec.beta2**t)
        th = th - eta[t - 1] * (alpha * m_hat / (np.sqrt(v_hat) + spec.eps) + lam * th)  # Alg. 2, line 12
    np.testing.assert_allclose(got, th, rtol=1e-12, atol=1e-14)


def test_adamw_decay_is_decoupled_from_the_gradient():
    # Loshchilov & Hutter 2019, Alg. 2: with g = 0 the Adam term vanishes and θ shrinks by (1 − η_t λ) per step,
    # independent of α (η_t = 1 for a constant schedule)
    spec = OptimizerSpec(method="adamw", learning_rate=0.1, weight_decay=0.2)
    theta = data(4)[0]
    got, _ = run(spec, theta, [np.zeros(N)] * 5)
    np.testing.assert_allclose(got, theta * (1 - 0.2) ** 5, rtol=1e-13)


@pytest.mark.parametrize("l2", [0.0, 0.03])
def test_sgd_with_coupled_l2(l2):
    spec = OptimizerSpec(method="sgd", learning_rate=0.1, weight_decay=l2, schedule="cosine")
    theta, grads = data(5)
    got, rates = run(spec, theta, grads)
    th = theta.copy()
    for lr, g in zip(rates, grads, strict=True):
        th = th - lr * (g + l2 * th)  # gradient descent on f + ½λ‖θ‖². common practice
    np.testing.assert_allclose(got, th, rtol=1e-13, atol=1e-15)


def test_classical_momentum_matches_sutskever_eq_1_2():
    spec = OptimizerSpec(method="momentum", learning_rate=0.05, momentum=0.9, weight_decay=0.01)
    theta, grads = data(6)
    got, _ = run(spec, theta, grads)
    th, v = theta.copy(), np.zeros(N)
    for g in grads:
        v = spec.momentum * v - spec.learning_rate * (g + spec.weight_decay * th)  # Sutskever et al. 2013, eq. 1
        th = th + v  # eq. 2
    np.testing.assert_allclose(got, th, rtol=1e-13, atol=1e-15)


@pytest.mark.parametrize("mu", [0.5, 0.9, 0.99])
def test_nesterov_look_ahead_form_equals_sutskever_original(mu):
    # Quadratic f(θ) = ½ θᵀAθ − bᵀθ, A symmetric positive definite; ∇f(θ) = Aθ − b.
    rng = np.random.default_rng(7)
    Q = rng.standard_normal((N, N))
    A = Q @ Q.T / N + 0.1 * np.eye(N)
    b = rng.standard_normal(N)
    eps = 0.1
    theta0 = rng.standard_normal(N)

    # Sutskever et al. 2013, eq. 3–4: v_{t+1} = μv_t − ε∇f(θ_t + μv_t); θ_{t+1} = θ_t + v_{t+1}
    theta, v = theta0.copy(), np.zeros(N)
    original = []
    for _ in range(40):
        v = mu * v - eps * (A @ (theta + mu * v) - b)
        theta = theta + v
        original.append(theta.copy())

    spec = OptimizerSpec(method="nesterov", learning_rate=eps, momentum=mu)
    opt = Optimizer(spec, N, np.dtype(np.float64))
    stored = theta0.copy()  # Θ_0 = θ_0 since v_0 = 0
    for t in range(40):
        opt.step(stored, A @ stored - b, 40)  # our gradient is taken at the stored look-ahead point Θ
        recovered = stored - mu * opt.state["velocity"]  # θ_t = Θ_t − μ v_t
        np.testing.assert_allclose(recovered, original[t], rtol=0, atol=1e-12)


@pytest.mark.parametrize("method", ["sgd", "momentum", "nesterov", "adam", "adamw"])
def test_float32_state_and_update_close_to_float64(method):
    spec = OptimizerSpec(method=method, learning_rate=0.01, weight_decay=0.01)
    theta, grads = data(8)
    got32, _ = run(spec, theta, grads, dtype=np.float32)
    got64, _ = run(spec, theta, grads, dtype=np.float64)
    assert got32.dtype == np.float32
    np.testing.assert_allclose(got32, got64, rtol=1e-5, atol=1e-6)  # float32 round-off, u ≈ 6e-8 per step


def test_optimizer_state_keeps_the_params_layout():
    for method, names in (("sgd", []), ("momentum", ["velocity"]), ("nesterov", ["velocity"]), ("adam", ["m", "v"]),
                          ("adamw", ["m", "v"])):
        opt = Optimizer(OptimizerSpec(method=method), 11, np.dtype(np.float32))
        assert sorted(opt.state) == sorted(names)
        assert all(a.shape == (11,) and a.dtype == np.float32 and not a.any() for a in opt.state.values())


# --- learning-rate schedules ------------------------------------------------------------------------------------
@settings(max_examples=25, deadline=None)
@given(lr=st.floats(min_value=1e-5, max_value=1.0), warmup=st.integers(min_value=0, max_value=20),
       extra=st.integers(min_value=1, max_value=200), every=st.integers(min_value=1, max_value=30),
       factor=st.floats(min_value=0.05, max_value=1.0))
def test_schedules_match_their_formulas(lr, warmup, extra, every, factor):
    total = warmup + extra
    for schedule in ("constant", "step", "cosine"):
        spec = OptimizerSpec(learning_rate=lr, schedule=schedule, warmup=warmup, step_every=every,
                             step_factor=factor)
        for t in range(total + 1):
            got = learning_rate(spec, t, total)
            if t < warmup:  # linear warm-up (Goyal et al. 2017): lr·(t + 1)/warmup, reaching lr at t = warmup − 1
                expected = lr * (t + 1) / warmup
            elif schedule == "step":  # ×factor every `every` steps after warm-up. common practice
                expected = lr * factor ** ((t - warmup) // every)
            elif schedule == "cosine":  # Loshchilov & Hutter 2017, eq. 5, η_min = 0, T_cur = t − w, T_i = total − w
                expected = 0.5 * lr * (1 + math.cos(math.pi * (t - warmup) / (total - warmup)))
            else:
                expected = lr
            assert got == pytest.approx(expected, rel=1e-12, abs=1e-300), (schedule, t)


def test_cosine_end_points_and_warmup_peak():
    spec = OptimizerSpec(learning_rate=0.4, schedule="cosine", warmup=10)
    assert learning_rate(spec, 0, 110) == pytest.approx(0.04)  # lr / warmup on the first step
    assert learning_rate(spec, 9, 110) == pytest.approx(0.4)  # peak at the end of warm-up
    assert learning_rate(spec, 10, 110) == pytest.approx(0.4)  # cos(0) = 1: SGDR starts at η_max
    assert learning_rate(spec, 60, 110) == pytest.approx(0.2)  # half-way: ½η_max
    assert learning_rate(spec, 110, 110) == pytest.approx(0.0, abs=1e-15)  # reaches η_min = 0
    assert learning_rate(spec, 150, 110) == pytest.approx(0.0, abs=1e-15)  # and stays there


def test_optimizer_uses_the_schedule_it_reports():
    spec = OptimizerSpec(method="sgd", learning_rate=0.3, schedule="step", warmup=2, step_every=3, step_factor=0.5)
    _, rates = run(spec, np.zeros(N), [np.ones(N)] * STEPS)
    assert rates == [learning_rate(spec, t, STEPS) for t in range(STEPS)]
    assert rates[:6] == pytest.approx([0.15, 0.3, 0.3, 0.3, 0.3, 0.15])  # warm-up 2, then ×½ every 3 steps


# --- clipping ---------------------------------------------------------------------------------------------------
@pytest.mark.parametrize("dtype", [np.float32, np.float64])
@settings(max_examples=25, deadline=None)
@given(seed=st.integers(min_value=0, max_value=2**32 - 1), limit=st.floats(min_value=1e-3, max_value=100.0),
       spread=st.floats(min_value=1e-2, max_value=1e2))
def test_clip_global_norm(dtype, seed, limit, spread):
    g = (spread * np.random.default_rng(seed).standard_normal(N)).astype(dtype)
    before = g.copy()
    norm = float(np.linalg.norm(before.astype(np.float64)))  # numpy.linalg.norm
    Optimizer(OptimizerSpec(clip_global_norm=limit), N, np.dtype(dtype)).clip(g)
    tol = 1e-6 if dtype == np.float32 else 1e-13
    if norm > limit:  # rescaled to the limit, direction kept. common practice
        assert np.linalg.norm(g.astype(np.float64)) == pytest.approx(limit, rel=tol)
        np.testing.assert_allclose(g, before * (limit / norm), rtol=tol)
    else:
        np.testing.assert_array_equal(g, before)


def test_clip_off_leaves_gradients_untouched():
    g = np.full(N, 1e6)
    Optimizer(replace(OptimizerSpec(), clip_global_norm=0.0), N, np.dtype(np.float64)).clip(g)
    np.testing.assert_array_equal(g, 1e6)


# --- the update kernels on slices (the sharded update) -----------------------------------------------------------
def apply_kernel(method: str, params: np.ndarray, grads: np.ndarray, state: list[np.ndarray], step: int) -> None:
    """One update of shardmill.kernels.optim's kernel for ``method`` in place (AdamW: Adam with decoupled decay)."""
    from shardmill.kernels import optim as kernels

    if method == "sgd":
        kernels.sgd(params, grads, 0.03, 0.01)
    elif method in ("momentum", "nesterov"):
        getattr(kernels, method)(params, grads, state[0], 0.03, 0.9, 0.01)
    else:
        l2, decay = (0.0, 1e-3) if method == "adamw" else (0.01, 0.0)
        kernels.adam(params, grads, state[0], state[1], 0.01, 0.9, 0.999, 1e-8, float(step), l2, decay)


@pytest.mark.parametrize("dtype", [np.float32, np.float64])
@pytest.mark.parametrize("method", ["sgd", "momentum", "nesterov", "adam", "adamw"])
@pytest.mark.parametrize("lo, hi", [(0, 1037), (13, 1000), (1, 4), (1030, 1037), (500, 500)])
def test_update_of_a_slice_has_the_bits_of_the_update_of_that_slice_alone(method, dtype, lo, hi):
    n, steps = 1037, 3  # odd bounds and lengths: the slice and its copy split differently into vector and tail
    rng = np.random.default_rng(11)
    params = rng.standard_normal(n).astype(dtype)
    params[::7] = 0.0  # biases start at zero
    state = [rng.standard_normal(n).astype(dtype) for _ in STATE_NAMES[method]]
    if method in ("adam", "adamw"):
        state[1] = np.abs(state[1])  # v ≥ 0
    alone_params, alone_state = params[lo:hi].copy(), [s[lo:hi].copy() for s in state]
    outside = np.r_[0:lo, hi:n]
    before = [params[outside].copy(), *(s[outside].copy() for s in state)]
    for step in range(1, steps + 1):
        grads = rng.standard_normal(n).astype(dtype)
        apply_kernel(method, params[lo:hi], grads[lo:hi], [s[lo:hi] for s in state], step)
        apply_kernel(method, alone_params, grads[lo:hi].copy(), alone_state, step)
    # an element-wise update is a function of its own element only, wherever the element lies. common practice
    assert params[lo:hi].tobytes() == alone_params.tobytes()
    for whole, alone in zip(state, alone_state, strict=True):
        assert whole[lo:hi].tobytes() == alone.tobytes()
    after = [params[outside], *(s[outside] for s in state)]
    for was, now in zip(before, after, strict=True):
        assert was.tobytes() == now.tobytes()  # nothing outside the slice is written. common practice


VECTOR_CHECK = """
import re, sys
import numba
from shardmill.kernels import optim
array = {name: numba.types.Array(getattr(numba, name), 1, "C") for name in ("float32", "float64")}
f = numba.float64
for name, dtype in ((n, d) for n in ("sgd", "momentum", "nesterov", "adam", "scale") for d in array):
    a = array[dtype]
    signature = {"sgd": (a, a, f, f), "momentum": (a, a, a, f, f, f), "nesterov": (a, a, a, f, f, f),
                 "adam": (a, a, a, a, f, f, f, f, f, f, f), "scale": (a, f)}[name]
    kernel = getattr(optim, name)
    options = {k: v for k, v in kernel.targetoptions.items() if k not in ("cache", "nopython")}
    fresh = numba.njit(**options)(kernel.py_func)  # cached code cannot be inspected
    fresh.compile(signature)
    packed = re.findall(r"\\tv(?:mul|add|sub|div|sqrt)p[sd]\\s[^\\n]*ymm", fresh.inspect_asm(signature))
    print(name, dtype, len(packed))
"""


@pytest.mark.skipif(platform.machine() not in ("x86_64", "AMD64"), reason="an x86-64 code check")
def test_update_kernels_vectorise_on_avx2():
    # Haswell's instruction set, AVX-512 off, whatever this machine has (DEVELOPERS.md: hot loops vectorise on AVX2)
    env = {**os.environ, "NUMBA_CPU_NAME": "haswell",
           "NUMBA_CPU_FEATURES": "+avx,+avx2,+fma,+sse4.2,+popcnt,+f16c,+bmi,+bmi2,+lzcnt,+movbe"}
    done = subprocess.run([sys.executable, "-c", VECTOR_CHECK], env=env, capture_output=True, text=True, timeout=300)
    assert done.returncode == 0, done.stderr[-2000:]
    counts = {tuple(line.split()[:2]): int(line.split()[2]) for line in done.stdout.splitlines()}
    assert len(counts) == 10
    for (name, dtype), packed in counts.items():
        # packed arithmetic on 256-bit registers: the loop runs 4 or 8 elements at a time. common practice
        assert packed > 0, f"{name} {dtype} runs scalar on AVX2"


@pytest.mark.parametrize("dtype", [np.float32, np.float64])
def test_adam_with_the_smallest_allowed_eps_stays_finite_on_zero_gradients(dtype):
    # The schema allows any ε > 0; Adam divides by √v̂ + ε, and v = 0 for a gradient that was always 0, so the
    # ε the kernel sees must not round to 0 in the arrays' dtype (Kingma & Ba 2015, Algorithm 1: ε > 0).
    spec = replace(OptimizerSpec(), method="adam", eps=1e-50)
    params = np.ones(8, dtype=dtype)
    Optimizer(spec, params.size, np.dtype(dtype)).step(params, np.zeros(8, dtype=dtype), 10)
    np.testing.assert_array_equal(params, 1.0)  # m = 0: no step at all


@pytest.mark.parametrize("dtype", [np.float32, np.float64])
@pytest.mark.parametrize("n", [1, 255, 256, 1000])
def test_block_sums_of_squares_match_an_exact_sum_per_block(dtype, n):
    from shardmill.kernels.optim import block_sum_squares

    x = np.random.default_rng(n).standard_normal(n).astype(dtype)
    out = np.empty(-(-n // 256))
    block_sum_squares(x, 256, out)
    for b in range(out.size):
        block = [float(v) ** 2 for v in x[b * 256:(b + 1) * 256]]
        # math.fsum is correctly rounded (Shewchuk 1997); a left-to-right float64 sum of ≤ 256 positive terms
        # is within γ_255 of it (Higham 2002, §4.2).
        assert out[b] == pytest.approx(math.fsum(block), rel=256 * 2.0**-53)
    # the same block gives the same bits wherever it lies (the sharded clip norm relies on it)
    if n >= 512:
        alone = np.empty(1)
        block_sum_squares(x[256:512], 256, alone)
        assert alone[0] == out[1]
