"""Communication cost model of a data-parallel step: allreduce, reduce-scatter and allgather.

The model is the α–β–γ model of Thakur, Rabenseifner & Gropp, "Optimization of Collective Communication
Operations in MPICH", IJHPCA 19(1), 2005: sending one message of n bytes between two processes costs
α + n·β seconds (α: latency in seconds, β: inverse bandwidth in seconds per byte), and combining n bytes
with the reduction operator costs n·γ seconds (γ in seconds per byte).

Every collective algorithm below costs

    T(p, n) = c_α(p)·α + c_β(p)·n·β + c_γ(p)·n·γ

so one table of coefficients per collective (`_coefficients`, `_reduce_scatter_coefficients`,
`_allgather_coefficients`) serves the forward model, the choice of the cheapest algorithm and the
least-squares fit of α and β to measured timings (`fitting.py`).

A step sends one allreduce of the gradient (replicated update), or a reduce-scatter of the gradient and an
allgather of the parameters (sharded update; exact mode reduce-scatters its integer sums either way): each part of
an exchange strategy states its own (`parallel/exchange.py`), `step_collectives` reads them, `project_step`
prices them.

The file reads top to bottom: formulas → cheapest algorithm → network specs → projection. It needs no MPI; the
fit of α and β to the timings of `measure.py` is `fitting.py`'s.
"""

from __future__ import annotations

import difflib
import math
import re
from collections.abc import Iterable, Sequence
from typing import Any

import numpy as np
from shardmill.parallel.collectives import COLLECTIVES, Collective
from shardmill.parallel.exactformats import FORMATS
from shardmill.parallel.exchange import choose
from shardmill.parallel.ownership import BLOCK

ALGORITHMS: tuple[str, ...] = ("ring", "recursive_doubling", "rabenseifner")
"""Allreduce algorithms the model knows, in the order used to break ties in `best_allreduce`."""

REDUCE_SCATTER_ALGORITHMS: tuple[str, ...] = ("ring", "recursive_halving")
"""Reduce-scatter algorithms the model knows, in the order used to break ties in `best_collective`."""

ALLGATHER_ALGORITHMS: tuple[str, ...] = ("ring", "bruck")
"""Allgather algorithms the model knows, in the order used to break ties in `best_collective`."""

UPDATES: tuple[str, ...] = ("replicated", "sharded")
"""How the optimizer update is split (the job's `run.update`): every rank updates everything, or its own slice."""

COMPACT_SCALE_BLOCK = BLOCK
"""Parameters sharing one scale in the compact exact format (`parallel.ownership.BLOCK`, which the strategy uses)."""

NO_COMMUNICATION = "none"
"""Algorithm name reported by `best_allreduce` and `project` for p = 1, where nothing is sent."""

ASSUMPTIONS: tuple[str, ...] = (
    "Every message costs alpha + n*beta seconds (Thakur, Rabenseifner & Gropp 2005): homogeneous links, "
    "the same latency and bandwidth between every pair of ranks.",
    "No contention: simultaneous messages do not share links or switches, and each rank sends and receives "
    "at full bandwidth at the same time.",
    "One rank per core; a rank's compute does not slow down when others communicate, and intra-node and "
    "inter-node messages cost the same.",
    "The reduction cost gamma (seconds per byte) is measured on this machine by a numpy in-place add and "
    "assumed the same on every rank.",
    "Messages split evenly: n/p is treated as a real number, so rounding of uneven chunks is ignored.",
    "For p not a power of two, recursive doubling, Rabenseifner's algorithm and recursive halving first fold "
    "the extra ranks into partners and send the result back at the end, as the paper describes.",
    "The library is assumed to pick the cheapest of ring, recursive doubling and Rabenseifner for the "
    "message size, as MPI libraries switch algorithms by size.",
    "A step's exchange is priced as whole-vector collectives: one allreduce of the gradient (replicated "
    "update), or a reduce-scatter of the gradient and an allgather of the parameters (sharded update; exact mode "
    "reduce-scatters its integer sums and allgathers the gradient or the parameters); message grouping is represented "
    "only by the overlap fraction, the share of communication hidden behind backward, which is given and not "
    "derived from the backward time.",
    "Reduce-scatter and allgather cost the same alpha and beta per message as the allreduce (the same links), "
    "each with its cheapest algorithm.",
    "Strong scaling divides the serial compute time by p perfectly except the optimizer update of a replicated "
    "update, which every rank repeats over all parameters; weak scaling keeps the per-rank compute constant "
    "except a sharded update, which divides by p. Neither includes load imbalance.",
)
"""Assumptions of the model, one sentence each, for reports."""


# --------------------------------------------------------------------------------------------------------
# Validation helpers (one error type, messages that say what to type)
# --------------------------------------------------------------------------------------------------------


def _check_choice(value: str, allowed: tuple[str, ...], name: str) -> None:
    if value in allowed:
        return
    close = difflib.get_close_matches(str(value), allowed, n=1)
    hint = f" (did you mean '{close[0]}'?)" if close else ""
    raise ValueError(f"`{name}` must be one of {', '.join(allowed)}; got {value!r}{hint}")


def _check_processes(p: Any, name: str = "p") -> int:
    if isinstance(p, bool) or not isinstance(p, (int, np.integer)) or p < 1:
        raise ValueError(f"`{name}` must be a whole number of processes >= 1; got {p!r}")
    return int(p)


def check_non_negative(value: Any, name: str) -> float:
    try:
        number = float(value)
    except (TypeError, ValueError):
        number = math.nan
    if not math.isfinite(number) or number < 0.0:
        raise ValueError(f"`{name}` must be a finite number >= 0; got {value!r}")
    return number


# --------------------------------------------------------------------------------------------------------
# Formulas
# --------------------------------------------------------------------------------------------------------


def _lower_power_of_two(p: int) -> int:
    return 1 << (p.bit_length() - 1)


def _coefficients(algorithm: str, p: int) -> tuple[float, float, float]:
    """(c_α, c_β, c_γ) such that T = c_α·α + c_β·n·β + c_γ·n·γ for an allreduce on p processes.

    Thakur, Rabenseifner & Gropp 2005 (allreduce, reduce-scatter and allgather sections):
      ring                 2(p−1)         2(p−1)/p          (p−1)/p
      recursive_doubling   lg p           lg p              lg p
      rabenseifner         2 lg p         2(p−1)/p          (p−1)/p
    For p not a power of two, p' = 2^⌊lg p⌋: the r = p − p' extra ranks send their whole vector to a
    partner that reduces it (α + nβ + nγ), the algorithm runs on p', and the result goes back (α + nβ).
    """
    if p == 1:
        return 0.0, 0.0, 0.0
    if algorithm == "ring":
        # Reduce-scatter ring (p−1 steps of n/p bytes, each reduced) + allgather ring (p−1 steps of n/p).
        share = (p - 1) / p
        return 2.0 * (p - 1), 2.0 * share, share
    core = _lower_power_of_two(p)
    steps = math.log2(core)
    if algorithm == "recursive_doubling":
        # lg p' exchanges of the whole vector, each followed by a reduction of the whole vector.
        c_alpha, c_beta, c_gamma = steps, steps, steps
    else:  # rabenseifner
        # Recursive halving (lg p' steps, n/2, n/4, … bytes, each reduced) + recursive doubling allgather.
        share = (core - 1) / core
        c_alpha, c_beta, c_gamma = 2.0 * steps, 2.0 * share, share
    if core != p:
        # Fold before (α + nβ + nγ) and send back after (α + nβ).
        c_alpha, c_beta, c_gamma = c_alpha + 2.0, c_beta + 2.0, c_gamma + 1.0
    return c_alpha, c_beta, c_gamma


def allreduce_time(algorithm: str, p: int, n_bytes: float, alpha: float, beta: float, gamma: float = 0.0) -> float:
    """Modelled time in seconds of an allreduce of `n_bytes` bytes on `p` processes.

    `alpha` is the latency per message (seconds), `beta` the inverse bandwidth (seconds per byte), `gamma`
    the reduction cost (seconds per byte). Formulas after Thakur, Rabenseifner & Gropp 2005:

        ring                 2(p−1)α + 2((p−1)/p)·nβ + ((p−1)/p)·nγ
        recursive_doubling   lg p·α  + lg p·nβ       + lg p·nγ
        rabenseifner         2 lg p·α + 2((p−1)/p)·nβ + ((p−1)/p)·nγ

    The ring is the paper's ring reduce-scatter followed by its ring allgather and works for every p.
    For p not a power of two the two recursive algorithms run on p' = 2^⌊lg p⌋ processes, with the paper's
    extra step: the r = p − p' surplus ranks first send their whole vector to a partner that reduces it
    (α + nβ + nγ) and receive the result at the end (α + nβ). This adds 2α + 2nβ + nγ, so with p' in place
    of p in the formulas above:

        recursive_doubling   (lg p' + 2)α  + (lg p' + 2)·nβ         + (lg p' + 1)·nγ
        rabenseifner         (2 lg p' + 2)α + (2 + 2(p'−1)/p')·nβ   + (1 + (p'−1)/p')·nγ

    The γ term of the second line equals the paper's cost of recursive-halving reduce-scatter for p not a
    power of two; the paper's β term there, 2nβ, is the same count rounded. The cleverer non-power-of-two
    schemes of Rabenseifner & Träff (2004) are not modelled. p = 1 costs 0.
    """
    return collective_time("allreduce", algorithm, p, n_bytes, alpha, beta, gamma)


def best_allreduce(p: int, n_bytes: float, alpha: float, beta: float, gamma: float = 0.0) -> tuple[str, float]:
    """The cheapest algorithm for this message size and its time in seconds.

    MPI libraries switch algorithms by message size in the same spirit: latency-bound recursive doubling for
    short messages, bandwidth-optimal schemes for long ones. Ties go to the earlier name in `ALGORITHMS`.
    For p = 1 the answer is (`NO_COMMUNICATION`, 0.0).
    """
    p = _check_processes(p)
    if p == 1:
        return NO_COMMUNICATION, 0.0
    costs = [(allreduce_time(name, p, n_bytes, alpha, beta, gamma), name) for name in ALGORITHMS]
    best_time, best_name = min(costs, key=lambda cost: cost[0])  # min keeps the first of equal costs
    return best_name, best_time


def _reduce_scatter_coefficients(algorithm: str, p: int) -> tuple[float, float, float]:
    """(c_α, c_β, c_γ) of a reduce-scatter of an n-byte vector on p processes (each ends with n/p bytes of the sum).

    Thakur, Rabenseifner & Gropp 2005, reduce-scatter section:
      ring (pairwise exchange costs the same)   p − 1          (p−1)/p      (p−1)/p
      recursive_halving, p a power of two       lg p           (p−1)/p      (p−1)/p
      recursive_halving, any other p            ⌊lg p⌋ + 2     2            1 + (p'−1)/p'
    with p' = 2^⌊lg p⌋: the surplus ranks first send their whole vector to a partner that reduces it, and get
    their own n/p of the result back at the end; the paper rounds the β count of those extra steps up to 2n.
    """
    if p == 1:
        return 0.0, 0.0, 0.0
    share = (p - 1) / p
    if algorithm == "ring":
        return float(p - 1), share, share
    core = _lower_power_of_two(p)
    if core == p:
        return math.log2(p), share, share
    return math.log2(core) + 2.0, 2.0, 1.0 + (core - 1) / core


def _allgather_coefficients(algorithm: str, p: int) -> tuple[float, float, float]:
    """(c_α, c_β, c_γ) of an allgather that leaves the whole n-byte vector on each of p processes (n/p from each).

    Thakur, Rabenseifner & Gropp 2005, allgather section (nothing is reduced, so c_γ = 0):
      ring    p − 1      (p−1)/p
      bruck   ⌈lg p⌉     (p−1)/p     (any p; recursive doubling costs the same when p is a power of two)
    """
    if p == 1:
        return 0.0, 0.0, 0.0
    share = (p - 1) / p
    if algorithm == "ring":
        return float(p - 1), share, 0.0
    return float(math.ceil(math.log2(p))), share, 0.0


_COEFFICIENTS = {
    "allreduce": (ALGORITHMS, _coefficients),
    "reduce_scatter": (REDUCE_SCATTER_ALGORITHMS, _reduce_scatter_coefficients),
    "allgather": (ALLGATHER_ALGORITHMS, _allgather_coefficients),
}


def collective_time(kind: str, algorithm: str, p: int, n_bytes: float, alpha: float, beta: float,
                    gamma: float = 0.0) -> float:
    """Modelled seconds of one collective of `kind` (see `COLLECTIVES`) on a vector of `n_bytes` bytes.

    n_bytes is the whole vector, the paper's n: the full gradient for a reduce-scatter, the full result of an
    allgather. alpha: seconds per message, beta: seconds per byte, gamma: seconds per byte reduced. The
    coefficients are those of `allreduce_time`, `reduce_scatter_time` and `allgather_time`; p = 1 costs 0.
    """
    _check_choice(kind, COLLECTIVES, "kind")
    algorithms, coefficients = _COEFFICIENTS[kind]
    _check_choice(algorithm, algorithms, "algorithm")
    p = _check_processes(p)
    n_bytes = check_non_negative(n_bytes, "n_bytes")
    alpha = check_non_negative(alpha, "alpha")
    beta = check_non_negative(beta, "beta")
    gamma = check_non_negative(gamma, "gamma")
    c_alpha, c_beta, c_gamma = coefficients(algorithm, p)
    return c_alpha * alpha + c_beta * n_bytes * beta + c_gamma * n_bytes * gamma


def reduce_scatter_time(algorithm: str, p: int, n_bytes: float, alpha: float, beta: float,
                        gamma: float = 0.0) -> float:
    """Modelled seconds of a reduce-scatter of `n_bytes` bytes (the whole vector) on `p` processes.

    After Thakur, Rabenseifner & Gropp 2005 (units as in `allreduce_time`):

        ring                          (p−1)α + ((p−1)/p)·nβ + ((p−1)/p)·nγ
        recursive_halving, p = 2^k    lg p·α + ((p−1)/p)·nβ + ((p−1)/p)·nγ
        recursive_halving, other p    (⌊lg p⌋ + 2)α + 2nβ + (1 + (p'−1)/p')·nγ,  p' = 2^⌊lg p⌋

    The paper's pairwise-exchange algorithm for long messages costs the same as the ring. The ring
    reduce-scatter followed by the ring allgather is the ring allreduce of `allreduce_time`; recursive halving
    followed by recursive doubling is Rabenseifner's allreduce when p is a power of two.
    """
    return collective_time("reduce_scatter", algorithm, p, n_bytes, alpha, beta, gamma)


def allgather_time(algorithm: str, p: int, n_bytes: float, alpha: float, beta: float) -> float:
    """Modelled seconds of an allgather that leaves `n_bytes` bytes (the whole vector) on each of `p` processes.

    After Thakur, Rabenseifner & Gropp 2005 (units as in `allreduce_time`; nothing is reduced):

        ring     (p−1)α  + ((p−1)/p)·nβ
        bruck    ⌈lg p⌉α + ((p−1)/p)·nβ     (recursive doubling's cost when p is a power of two)
    """
    return collective_time("allgather", algorithm, p, n_bytes, alpha, beta)


def best_collective(kind: str, p: int, n_bytes: float, alpha: float, beta: float,
                    gamma: float = 0.0) -> tuple[str, float]:
    """The cheapest algorithm of `kind` for this message size and its time in seconds, as `best_allreduce`.

    Ties go to the earlier name in the kind's list of algorithms; p = 1 gives (`NO_COMMUNICATION`, 0.0).
    """
    _check_choice(kind, COLLECTIVES, "kind")
    p = _check_processes(p)
    if p == 1:
        return NO_COMMUNICATION, 0.0
    costs = [(collective_time(kind, name, p, n_bytes, alpha, beta, gamma), name) for name in _COEFFICIENTS[kind][0]]
    best_time, best_name = min(costs, key=lambda cost: cost[0])  # min keeps the first of equal costs
    return best_name, best_time


def step_collectives(update: str, reduction: str, n_params: int, itemsize: int,
                     exact_format: str = "wide") -> tuple[Collective, ...]:
    """The collectives of one step's exchange, as the strategy's two parts state them (`parallel/exchange.py`).

    update: "replicated" or "sharded" (`run.update`); reduction: "fast" or "exact" (`run.reduction`);
    n_params: parameters; itemsize: bytes per parameter (4 for float32, 8 for float64); exact_format: "wide"
    (3 int64 per parameter, one reduce-scatter call per limb row), "compact" (1 int64 per parameter on a
    scale per `COMPACT_SCALE_BLOCK` parameters, agreed by a MAX allreduce of float64 block maxima first) or
    "narrow" (the same with 1 int32 per parameter).

        fast, replicated   allreduce of the gradient (n_params·itemsize bytes)
        fast, sharded      reduce-scatter of the gradient, allgather of the parameters (both n_params·itemsize)
        exact, either      reduce-scatter of the integer sums (24, 8 or 4 bytes per parameter), allgather of the
                           gradient (replicated) or of the parameters (sharded), n_params·itemsize bytes
    """
    _check_choice(update, UPDATES, "update")
    _check_choice(reduction, ("fast", "exact"), "reduction")
    _check_choice(exact_format, tuple(FORMATS), "exact_format")
    if isinstance(n_params, bool) or not isinstance(n_params, (int, np.integer)) or n_params < 0:
        raise ValueError(f"`n_params` must be a whole number of parameters >= 0; got {n_params!r}")
    if itemsize not in (2, 4, 8):
        raise ValueError(f"`itemsize` must be one of 2, 4, 8 bytes per parameter; got {itemsize!r}")
    return choose(update, reduction, exact_format).collectives(int(n_params), itemsize)


# --------------------------------------------------------------------------------------------------------
# Network specs such as "100Gb/s,2us"
# --------------------------------------------------------------------------------------------------------

_BANDWIDTH_UNITS = {"Gb/s": 1e9 / 8.0, "Mb/s": 1e6 / 8.0, "GB/s": 1e9, "MB/s": 1e6}  # bytes per second
_LATENCY_UNITS = {"ns": 1e-9, "us": 1e-6, "µs": 1e-6, "ms": 1e-3, "s": 1.0}  # seconds
_QUANTITY = re.compile(r"^\s*([0-9]*\.?[0-9]+(?:[eE][+-]?[0-9]+)?)\s*([A-Za-zµ/]+)\s*$")
_NETWORK_FORMS = (
    "'<bandwidth>,<latency>' with bandwidth in Gb/s, Mb/s, GB/s or MB/s (decimal: 1 GB/s = 1e9 bytes/s, "
    "b = bit, B = byte) and latency in ns, us, ms or s, e.g. '100Gb/s,2us' or '12.5GB/s,1.5us'"
)


def parse_network(spec: str) -> tuple[float, float]:
    """Parse a network spec such as "100Gb/s,2us" into (alpha seconds, beta seconds per byte).

    The two parts may come in either order; units are case-sensitive because b (bit) and B (byte) differ.
    Bandwidth must be > 0; latency may be 0. Raises ValueError naming the value and the accepted forms.
    """
    if not isinstance(spec, str):
        raise ValueError(f"network spec must be a string of the form {_NETWORK_FORMS}; got {spec!r}")
    parts = spec.split(",")
    if len(parts) != 2:
        raise ValueError(f"network spec must be {_NETWORK_FORMS}; got {spec!r}")
    bandwidth: float | None = None
    latency: float | None = None
    for part in parts:
        match = _QUANTITY.match(part)
        if match is None:
            raise ValueError(f"cannot read {part.strip()!r} in network spec {spec!r}; expected {_NETWORK_FORMS}")
        value, unit = float(match.group(1)), match.group(2)
        if unit in _BANDWIDTH_UNITS:
            if bandwidth is not None:
                raise ValueError(f"network spec {spec!r} gives two bandwidths; expected {_NETWORK_FORMS}")
            bandwidth = value * _BANDWIDTH_UNITS[unit]
        elif unit in _LATENCY_UNITS:
            if latency is not None:
                raise ValueError(f"network spec {spec!r} gives two latencies; expected {_NETWORK_FORMS}")
            latency = value * _LATENCY_UNITS[unit]
        else:
            raise ValueError(
                f"unit {unit!r} in {part.strip()!r} of network spec {spec!r} is not accepted; expected {_NETWORK_FORMS}"
            )
    if bandwidth is None or latency is None:
        raise ValueError(f"network spec {spec!r} needs one bandwidth and one latency; expected {_NETWORK_FORMS}")
    if bandwidth <= 0.0:
        raise ValueError(f"bandwidth in network spec {spec!r} must be > 0; expected {_NETWORK_FORMS}")
    return latency, 1.0 / bandwidth


# --------------------------------------------------------------------------------------------------------
# Projection of step time and efficiency
# --------------------------------------------------------------------------------------------------------


def project(
    compute_s: float,
    grad_bytes: float,
    ps: Iterable[int],
    alpha: float,
    beta: float,
    gamma: float = 0.0,
    mode: str = "strong",
    overlap: float = 0.0,
    replicated_s: float = 0.0,
) -> list[dict[str, Any]]:
    """Project the step time of plain data parallelism (one allreduce of the gradient) to each p in `ps`.

    `project_step` with the collectives (Collective("allreduce", grad_bytes),) and a replicated update of
    replicated_s seconds: the part of compute_s that every rank repeats in full whatever p is (the optimizer
    update over all parameters); in strong mode only compute_s − replicated_s is divided by p.
    grad_bytes: bytes of the gradient allreduced each step. Each row also carries allreduce_s, the seconds
    of that allreduce (= comm_s).
    """
    grad_bytes = check_non_negative(grad_bytes, "grad_bytes")
    replicated_s = check_non_negative(replicated_s, "replicated_s")
    if replicated_s > check_non_negative(compute_s, "compute_s"):
        raise ValueError(f"`replicated_s` must be ≤ compute_s = {compute_s!r}; got {replicated_s!r}")
    rows = project_step(compute_s, (Collective("allreduce", grad_bytes),), ps, alpha, beta, gamma, mode=mode,
                        overlap=overlap, update="replicated", update_s=replicated_s)
    for row in rows:
        row["allreduce_s"] = row["comm_s"]
    return rows


def project_step(
    compute_s: float,
    collectives: Sequence[Collective],
    ps: Iterable[int],
    alpha: float,
    beta: float,
    gamma: float = 0.0,
    mode: str = "strong",
    overlap: float = 0.0,
    update: str = "replicated",
    update_s: float = 0.0,
) -> list[dict[str, Any]]:
    """Project the data-parallel step time and efficiency to each process count in `ps`.

    compute_s: seconds of compute per step — in "strong" mode the serial step (the global batch on one
    process), in "weak" mode the per-rank step. update_s: the part of compute_s that is the optimizer update.
    What divides by p:

        strong, replicated   (compute_s − update_s)/p + update_s   (every rank repeats the whole update)
        strong, sharded      compute_s/p                          (each rank updates its 1/p slice)
        weak,   replicated   compute_s
        weak,   sharded      compute_s − update_s + update_s/p

    collectives: what one step sends (`step_collectives`), each priced with its cheapest algorithm
    (`best_collective`) and counted `calls` times. alpha, beta, gamma: seconds, seconds per byte, seconds per
    byte. overlap ∈ [0, 1]: fraction of the communication hidden behind backward.

    For each p, one dict with keys: p, mode, update, compute_s (this rank's compute), update_s (this rank's
    update), comm (per collective: kind, n_bytes, calls, algorithm, seconds for all its calls), comm_s (their
    sum), algorithm (the algorithms joined with "+", `NO_COMMUNICATION` at p = 1), exposed_comm_s =
    comm_s·(1 − overlap), step_s = compute_s + exposed_comm_s, speedup and efficiency. With T1 = compute_s
    (p = 1 sends nothing) and Tp = step_s: strong — speedup = T1/Tp, efficiency = T1/(p·Tp); weak —
    speedup = p·T1/Tp (scaled speedup: p times the work in Tp), efficiency = T1/Tp. In both modes
    efficiency = speedup / p.
    """
    compute_s = check_non_negative(compute_s, "compute_s")
    if compute_s == 0.0:
        raise ValueError("`compute_s` must be > 0 to define a speedup; got 0")
    if mode not in ("strong", "weak"):
        raise ValueError(f"`mode` must be one of strong, weak; got {mode!r}")
    _check_choice(update, UPDATES, "update")
    update_s = check_non_negative(update_s, "update_s")
    if update_s > compute_s:
        raise ValueError(f"`update_s` must be ≤ compute_s = {compute_s!r}; got {update_s!r}")
    overlap = check_non_negative(overlap, "overlap")
    if overlap > 1.0:
        raise ValueError(f"`overlap` must be a fraction in [0, 1]; got {overlap!r}")
    for collective in collectives:
        _check_choice(collective.kind, COLLECTIVES, "kind")
        if isinstance(collective.calls, bool) or not isinstance(collective.calls, int) or collective.calls < 1:
            raise ValueError(f"`calls` of a {collective.kind} must be a whole number >= 1; got {collective.calls!r}")
    counts = [_check_processes(p, "ps") for p in ps]
    if not counts:
        raise ValueError("`ps` must name at least one process count; got none")
    serial_s = compute_s  # T1: at p = 1 the step is all compute, in both modes
    divided = update == "sharded"
    rows = []
    for p in counts:
        local_update_s = update_s / p if divided else update_s
        if mode == "strong":
            local_compute_s = (compute_s - update_s) / p + local_update_s
        else:  # the per-rank step stays; only a sharded update shrinks
            local_compute_s = compute_s - update_s + local_update_s if divided else compute_s
        comm = []
        for collective in collectives:
            algorithm, seconds = best_collective(collective.kind, p, collective.n_bytes, alpha, beta, gamma)
            comm.append({"kind": collective.kind, "n_bytes": collective.n_bytes, "calls": collective.calls,
                         "algorithm": algorithm, "seconds": collective.calls * seconds})
        comm_s = sum(entry["seconds"] for entry in comm)
        exposed_s = comm_s * (1.0 - overlap)
        step_s = local_compute_s + exposed_s
        speedup = serial_s / step_s if mode == "strong" else p * serial_s / step_s
        rows.append(
            {
                "p": p,
                "mode": mode,
                "update": update,
                "compute_s": local_compute_s,
                "update_s": local_update_s,
                "comm": comm,
                "comm_s": comm_s,
                "algorithm": "+".join(entry["algorithm"] for entry in comm) if p > 1 and comm else NO_COMMUNICATION,
                "exposed_comm_s": exposed_s,
                "step_s": step_s,
                "speedup": speedup,
                "efficiency": speedup / p,
            }
        )
    return rows
