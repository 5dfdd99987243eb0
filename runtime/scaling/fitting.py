"""Fitting α and β of the cost model (`costmodel.py`) to measured allreduce timings, by least squares.

Residuals are relative (timing noise is roughly multiplicative) and the terms non-negative (non-negative least
squares, exact by trying every support of the few columns). `_relative_least_squares` is the one solver: the
threaded compute term of `layoutmodel.py` is fitted with it too. No MPI here.
"""

from __future__ import annotations

import math
from collections.abc import Iterable, Sequence
from dataclasses import dataclass

import numpy as np
from shardmill.scaling.costmodel import ALGORITHMS, _check_choice, _check_processes, _coefficients, check_non_negative


@dataclass(frozen=True)
class Fit:
    """α and β fitted to allreduce timings of one algorithm on p processes.

    alpha: latency, seconds. beta: inverse bandwidth, seconds per byte. gamma: the reduction cost that was
    held fixed, seconds per byte. sizes_bytes / times_s: the data, bytes and seconds. predicted_s: the
    model at each size, seconds. relative_errors: (predicted − measured) / measured per point. r_squared:
    1 − SS_res / SS_tot on the times in seconds.
    """

    alpha: float
    beta: float
    gamma: float
    algorithm: str
    p: int
    sizes_bytes: tuple[float, ...]
    times_s: tuple[float, ...]
    predicted_s: tuple[float, ...]
    relative_errors: tuple[float, ...]
    r_squared: float

    @property
    def bandwidth_bytes_per_s(self) -> float:
        """1 / β in bytes per second (inf when β = 0)."""
        return math.inf if self.beta == 0.0 else 1.0 / self.beta

    @property
    def max_relative_error(self) -> float:
        """Largest |relative error| over the points."""
        return max(abs(error) for error in self.relative_errors)

    @property
    def rms_relative_error(self) -> float:
        """Root mean square of the relative errors."""
        return math.sqrt(sum(error * error for error in self.relative_errors) / len(self.relative_errors))


def _timing_arrays(sizes_bytes: Iterable[float], times_s: Iterable[float]) -> tuple[np.ndarray, np.ndarray]:
    sizes = np.asarray(list(sizes_bytes), dtype=np.float64)
    times = np.asarray(list(times_s), dtype=np.float64)
    if sizes.ndim != 1 or sizes.shape != times.shape:
        raise ValueError(
            f"`sizes_bytes` and `times_s` must be 1-D and of equal length; got {sizes.size} sizes "
            f"and {times.size} times"
        )
    if not (np.all(np.isfinite(sizes)) and np.all(sizes >= 0)):
        raise ValueError(f"`sizes_bytes` must be finite and >= 0; got {sizes.tolist()}")
    if not (np.all(np.isfinite(times)) and np.all(times > 0)):
        raise ValueError(f"`times_s` must be finite and > 0; got {times.tolist()}")
    if np.unique(sizes).size < 2:
        raise ValueError(
            f"fitting a latency and a bandwidth needs at least two distinct message sizes; "
            f"got {np.unique(sizes).tolist()}"
        )
    return sizes, times


def _fit_summary(times: np.ndarray, predicted: np.ndarray) -> tuple[tuple[float, ...], float]:
    relative = (predicted - times) / times
    total = float(np.sum((times - times.mean()) ** 2))
    residual = float(np.sum((times - predicted) ** 2))
    r_squared = 1.0 - residual / total if total > 0.0 else (1.0 if residual == 0.0 else 0.0)
    return tuple(float(error) for error in relative), r_squared


def _non_negative_least_squares(A: np.ndarray, b: np.ndarray) -> np.ndarray:
    """argmin ‖A x − b‖ subject to x ≥ 0, for the few columns of these fits (2 or 3), by trying every support.

    The optimum is the unconstrained least-squares solution on its own support (the KKT conditions of NNLS,
    Lawson & Hanson 1974, ch. 23), so the best non-negative candidate over all 2^k supports is the optimum.
    """
    k = A.shape[1]
    best, best_residual = np.zeros(k), float(np.sum(b * b))
    for mask in range(1, 2**k):
        support = [j for j in range(k) if mask >> j & 1]
        x_support, *_ = np.linalg.lstsq(A[:, support], b, rcond=None)
        if np.all(x_support >= 0.0):
            x = np.zeros(k)
            x[support] = x_support
            residual = float(np.sum((A @ x - b) ** 2))
            if residual < best_residual:
                best, best_residual = x, residual
    return best


def _relative_least_squares(design: np.ndarray, target: np.ndarray, times: np.ndarray) -> np.ndarray:
    """Solve design·x ≈ target, x ≥ 0, with every row divided by its measured time, columns scaled to unit norm.

    Timing noise is roughly multiplicative, so relative residuals weigh short and long messages alike; the
    column scaling puts α (≈ 1e-6 s) and β (≈ 1e-10 s/byte) on comparable footing for the solver.
    """
    rows = design / times[:, None]
    norms = np.linalg.norm(rows, axis=0)
    norms[norms == 0.0] = 1.0
    return _non_negative_least_squares(rows / norms, target / times) / norms


def fit_alpha_beta(
    p: int,
    sizes_bytes: Sequence[float],
    times_s: Sequence[float],
    algorithm: str = "ring",
    gamma: float = 0.0,
) -> Fit:
    """Fit α (seconds) and β (seconds per byte) to allreduce times measured on p processes.

    Least squares on T(n) = c_α(p)·α + c_β(p)·n·β with the known term c_γ(p)·n·γ subtracted first, where the
    coefficients are those of `allreduce_time` for `algorithm`. Residuals are relative (each point divided
    by its measured time), and α, β ≥ 0 are enforced with non-negative least squares (exact, by supports).
    `sizes_bytes` in bytes, `times_s` in seconds (e.g. the medians from `measure_allreduce`).
    Raises ValueError for p = 1 (nothing is communicated, so there is nothing to fit) and for fewer than two
    distinct sizes.
    """
    _check_choice(algorithm, ALGORITHMS, "algorithm")
    p = _check_processes(p)
    if p == 1:
        raise ValueError(
            "cannot fit alpha and beta for p = 1: an allreduce on one process sends no messages; measure with p >= 2"
        )
    gamma = check_non_negative(gamma, "gamma")
    sizes, times = _timing_arrays(sizes_bytes, times_s)
    c_alpha, c_beta, c_gamma = _coefficients(algorithm, p)
    known = c_gamma * sizes * gamma
    design = np.column_stack([np.full_like(sizes, c_alpha), c_beta * sizes])
    # The known γ term moves to the target; rows are still weighted by the measured time.
    alpha, beta = _relative_least_squares(design, times - known, times)
    predicted = c_alpha * alpha + c_beta * sizes * beta + known
    relative, r_squared = _fit_summary(times, predicted)
    return Fit(
        alpha=float(alpha),
        beta=float(beta),
        gamma=gamma,
        algorithm=algorithm,
        p=p,
        sizes_bytes=tuple(float(size) for size in sizes),
        times_s=tuple(float(t) for t in times),
        predicted_s=tuple(float(t) for t in predicted),
        relative_errors=relative,
        r_squared=r_squared,
    )
