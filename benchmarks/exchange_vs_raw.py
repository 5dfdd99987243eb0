"""The gradient exchange alone against a raw mpi4py in-place Allreduce of the same bytes (run on P ≥ 2 ranks).

Prints one JSON object (rank 0). The buffer is a ``grads`` array with the mid model's layout
(784-1024-1024-10, 1,863,690 parameters). One repetition of each contender:

* exchange: fill ``grads``; barrier; start the clock; ``MessageSum.layer_done(l)`` for every layer in
  backward order (l = L−1 … 0), which starts each message's non-blocking allreduce as it closes; ``finish()``;
  stop the clock. With overlap off, ``finish()`` is one blocking allreduce of the whole buffer.
* raw: fill the same ``grads``; barrier; start the clock; ``comm.Allreduce(MPI.IN_PLACE, grads)``; stop.

The fill is outside the clock for both. Each repetition's time is the maximum over ranks; the two contenders
take turns (which one goes first alternates). Reported: the median of ≥ 30 repetitions of each and
``exchange_over_raw`` = median(exchange) / median(raw) (target ≤ 1.05: the runtime adds nothing measurable
to MPI); also the ratio of the minima and the median of the per-repetition ratios (each exchange
against the raw call next to it), which bursts of load from other processes disturb less. Both results are
checked exactly (the fill holds small integers, so the sum is exact).

Started without a launcher, the script starts itself under the bundled ``mpiexec -n 2`` (``--ranks``).
Usage: ``python benchmarks/exchange_vs_raw.py [--quick] [--ranks 2]`` or ``mpiexec -n 2 python …``.
"""

from __future__ import annotations

import argparse
import os
import sys
from pathlib import Path
from typing import Any

import numpy as np
from benchsupport import MID_MODEL, LoadMeter, emit, log, machine_record
from shardmill.parallel.launch import run_for_status
from shardmill.timing import median, slowest_call
from threadpoolctl import threadpool_limits

TARGET = 1.05  # exchange / raw: our wrapper adds at most 5 % to a raw Allreduce
# 0.01 MB closes a message after every layer (3 messages); 4 MB (the default) gives 2; 64 MB one message.
MESSAGE_MIB = (0.01, 4.0, 64.0)
_LAUNCH_MARKERS = ("PMI_RANK", "PMI_SIZE", "PMIX_RANK", "OMPI_COMM_WORLD_SIZE", "MPI_LOCALNRANKS")


def launched_by_mpi() -> bool:
    """True when an MPI launcher started this process (checked before mpi4py initialises MPI)."""
    return any(name in os.environ for name in _LAUNCH_MARKERS)


def relaunch(ranks: int, argv: list[str], timeout: float) -> int:
    """This script on ``ranks`` processes under the bundled mpiexec (one BLAS thread each); its exit status."""
    log(f"starting this script on {ranks} processes")
    return run_for_status(ranks, [str(Path(__file__).resolve()), *argv], timeout=timeout)


def measure(comm, dtype: str, message_mib: float | None, repetitions: int, warmup: int) -> dict[str, Any]:
    """One configuration: overlap off when message_mib is None, else messages of at least message_mib MiB."""
    from mpi4py import MPI
    from shardmill.model.mlp import MLP
    from shardmill.parallel.ownership import Replicated
    from shardmill.parallel.summation import MessageSum

    model = MLP(MID_MODEL, dtype=dtype)
    grads = np.zeros_like(model.params)
    # Small integers times (rank + 1): every partial sum is exact, so the result is known exactly.
    base = (np.arange(grads.size) % 7 + 1).astype(dtype)
    fill = base * (comm.rank + 1)
    expected = base * (comm.size * (comm.size + 1) // 2)
    overlap = message_mib is not None
    exchange = MessageSum(comm, model, grads, Replicated(comm, grads.size), message_mib if overlap else 4.0,
                          overlap=overlap)
    layers = list(reversed(range(model.n_layers)))
    raw = MPI.COMM_WORLD  # the baseline is plain mpi4py, not our wrapper

    def exchange_round() -> None:
        for l in layers:
            exchange.layer_done(l)
        exchange.finish()

    def raw_round() -> None:
        raw.Allreduce(MPI.IN_PLACE, grads)

    def timed(fn) -> float:
        """Seconds of one round, the slowest rank's, after a barrier; the fill stays outside the clock."""
        np.copyto(grads, fill)
        return slowest_call(comm, fn)

    timed(exchange_round)
    exchange_ok = bool(np.array_equal(grads, expected))
    timed(raw_round)
    raw_ok = bool(np.array_equal(grads, expected))
    for _ in range(warmup):
        timed(exchange_round)
        timed(raw_round)
    slowest = np.zeros((2, repetitions))
    for r in range(repetitions):  # the two take turns: which one goes first alternates
        if r % 2 == 0:
            slowest[0, r] = timed(exchange_round)
            slowest[1, r] = timed(raw_round)
        else:
            slowest[1, r] = timed(raw_round)
            slowest[0, r] = timed(exchange_round)
    ok = np.array([exchange_ok and raw_ok], dtype=np.int64)
    comm.allreduce_min(ok)
    ex_ms, raw_ms = median(slowest[0]) * 1e3, median(slowest[1]) * 1e3
    sizes = [(stop - start) * grads.itemsize for start, stop in exchange.messages] if overlap else [grads.nbytes]
    return {
        "dtype": dtype,
        "overlap": overlap,
        "message_mib": message_mib,
        "messages": len(sizes),
        "message_bytes": sizes,
        "bytes": grads.nbytes,
        "repetitions": repetitions,
        "warmup": warmup,
        "exchange_ms_median": ex_ms,
        "raw_ms_median": raw_ms,
        "exchange_ms_min": float(slowest[0].min() * 1e3),
        "raw_ms_min": float(slowest[1].min() * 1e3),
        "exchange_over_raw": ex_ms / raw_ms,
        "exchange_over_raw_min": float(slowest[0].min() / slowest[1].min()),
        "exchange_over_raw_paired": median(slowest[0] / slowest[1]),
        "raw_gb_per_s": grads.nbytes / (raw_ms * 1e-3) / 1e9,
        "results_exact": bool(ok[0]),
        "target_at_most": TARGET,
        "met": ex_ms / raw_ms <= TARGET,
    }


def main(argv: list[str] | None = None) -> int:
    argv = list(sys.argv[1:] if argv is None else argv)
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--quick", action="store_true", help="short smoke version (< 30 s)")
    parser.add_argument("--ranks", type=int, default=2, help="processes when the script starts itself (default 2)")
    parser.add_argument("--repetitions", type=int, default=None, help="timed repetitions (default 60, quick 30)")
    args = parser.parse_args(argv)
    if not launched_by_mpi() and args.ranks > 1:
        return relaunch(args.ranks, argv, timeout=300)

    from mpi4py import MPI
    from shardmill.parallel.comm import Comm

    comm = Comm()
    meter = LoadMeter()
    repetitions = max(30, args.repetitions or (30 if args.quick else 60))
    warmup = 3 if args.quick else 5
    dtypes = ("float32",) if args.quick else ("float32", "float64")
    rows = []
    with threadpool_limits(limits=1, user_api="blas"):  # also when started by hand under mpiexec
        for dtype in dtypes:
            for message_mib in (None, *MESSAGE_MIB):
                if comm.rank == 0:
                    what = "overlap off" if message_mib is None else f"messages ≥ {message_mib} MiB"
                    log(f"exchange {dtype} {what}")
                rows.append(measure(comm, dtype, message_mib, repetitions, warmup))
    load = meter.stop(lambda own: float(comm.allreduce_sum(np.array([own]))[0]))
    if comm.rank == 0:
        emit({
            "benchmark": "exchange_vs_raw",
            "quick": args.quick,
            "processes": comm.size,
            "layers": MID_MODEL,
            "how": ("fill outside the clock; barrier; time the exchange (layer_done for every layer in backward "
                    "order, then finish) and, taking turns with it, a raw mpi4py Allreduce(MPI.IN_PLACE) of the same "
                    "buffer; per repetition the maximum over ranks; median over repetitions."),
            "mpi": {"version": ".".join(map(str, MPI.Get_version())),
                    "library": MPI.Get_library_version().strip().splitlines()[0]},
            "summary": [{k: r[k] for k in ("dtype", "overlap", "message_mib", "messages", "exchange_over_raw",
                                          "exchange_over_raw_paired", "exchange_over_raw_min", "met")}
                        for r in rows],
            "rows": rows,
            "load": load,
            "machine": machine_record(),
        })
    return 0


if __name__ == "__main__":
    sys.exit(main())
