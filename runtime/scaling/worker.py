"""One run of a scaling study on P processes: what `mpiexec -n P python -m shardmill.scaling.worker …` runs.

    pin (optional) → Trainer(job) → warm-up → N timed steps → the exchange alone → the GEMM floor (optional,
    `scale --layouts`) → per-rank record
    → gather to rank 0 → allreduce timings over MESSAGE_SIZES and the reduction cost γ → rank 0 writes runs/pP.json

Started by the driver (`driver.run_point`), one process per rank; reads the job, writes one JSON file.
"""

from __future__ import annotations

import argparse
import json
import os
import sys
import time
from pathlib import Path
from typing import Any

from shardmill.config import load_job
from shardmill.errors import JobError
from shardmill.parallel.exchange import resolve_update
from shardmill.scaling.measure import (
    COMM_BUDGET_S,
    MESSAGE_SIZES,
    gemm_floor_step,
    measure_reduction_gamma,
    time_allreduce,
)
from shardmill.timing import median, repeat_times

WARMUP_STEPS = 2
"""Untimed training steps after the kernel warm-up (first-touch of buffers, MPI connection set-up)."""


def exchange_alone(trainer: Any, repeats: int) -> dict[str, Any]:
    """Seconds of the step's exchange with no compute around it, on every rank (collective: every rank calls it).

    The same calls the step makes, in the same order, on the buffers the last timed step left: every layer
    handed to the strategy in backward order (`layer_done`: the fast strategies start their message reductions
    there), then `finish` (wait for them; exact mode reduce-scatters its integer sums, reads back and, for a
    replicated update, allgathers). That is what the step's "exchange" phase waits for, so the two compare:
    hidden fraction = 1 − exposed / alone. `publish` (the allgather of the parameters after a sharded update;
    nothing otherwise) also counts in the step's "exchange" phase; it is timed on its own, on a copy of the
    parameters, and the study adds it to the exchange alone.

    The gradient buffer is zeroed first: the fast strategies sum it in place, and zeros never overflow or turn
    subnormal however often they are summed (MPI's sums cost the same for any values). This runs after the
    timed steps and the trainer takes no step afterwards. Each repetition is the slowest rank's seconds after a
    barrier (`timing.repeat_times`), one untimed call first. Returns exchange_s and publish_s (medians,
    seconds), their times_s lists and repeats.
    """
    exchange = trainer.exchange
    layers = list(reversed(range(trainer.model.n_layers)))  # the order backward completes them
    params = trainer.model.params.copy()  # publish writes every rank's slice into it

    def gradient_exchange() -> None:
        for layer in layers:
            exchange.layer_done(layer)
        exchange.finish()

    trainer.grads.fill(0)
    exchange_times = repeat_times(gradient_exchange, repeats, warmup=1, comm=trainer.comm)
    publish_times = repeat_times(lambda: exchange.publish(params), repeats, warmup=1, comm=trainer.comm)
    return {"exchange_s": median(exchange_times), "exchange_times_s": exchange_times,
            "publish_s": median(publish_times), "publish_times_s": publish_times, "repeats": repeats}


def optimizer_state_bytes(trainer: Any) -> int:
    """Bytes of this rank's optimizer state (Adam's two moments, a velocity, or nothing for plain SGD)."""
    return int(sum(array.nbytes for array in trainer.optimizer.state.values()))


def pin_rank(rank: int, threads: int) -> list[int] | None:
    """Pin this process and all its threads to `threads` cores starting at rank·threads, modulo the allowed cores.

    With one thread per rank this is rank r → core r mod cores. Returns the cores, or None where the
    platform cannot set affinity (psutil has no cpu_affinity there).
    """
    import psutil

    process = psutil.Process()
    if not hasattr(process, "cpu_affinity"):
        return None
    allowed = sorted(process.cpu_affinity())
    cores = sorted({allowed[(rank * threads + k) % len(allowed)] for k in range(threads)})
    process.cpu_affinity(cores)
    # Threads started before now (MPI, BLAS pools) keep their old mask; new ones inherit the process's.
    if hasattr(os, "sched_setaffinity"):
        for thread in process.threads():
            try:
                os.sched_setaffinity(thread.id, cores)
            except OSError:
                pass
    return cores


def placement(pinned: list[int] | None) -> dict[str, Any]:
    """Where this rank runs: cpu (last CPU it ran on, or None), affinity (allowed CPUs), pinned (bool)."""
    import psutil

    process = psutil.Process()
    cpu = process.cpu_num() if hasattr(process, "cpu_num") else None
    affinity = sorted(process.cpu_affinity()) if hasattr(process, "cpu_affinity") else None
    return {"cpu": cpu, "affinity": affinity, "pinned": pinned is not None, "pinned_cores": pinned}


def memory() -> dict[str, int]:
    """rss_bytes (now, psutil) and peak_rss_bytes (resource.getrusage maxrss: KiB on Linux, bytes on macOS)."""
    import psutil

    rss = int(psutil.Process().memory_info().rss)
    try:
        import resource

        peak = resource.getrusage(resource.RUSAGE_SELF).ru_maxrss
        peak = int(peak if sys.platform == "darwin" else peak * 1024)
    except ImportError:  # no resource module (Windows): the current RSS is the best we have
        peak = rss
    return {"rss_bytes": rss, "peak_rss_bytes": max(peak, rss)}


def run_worker(job_path: Path, global_batch: int, steps: int, threads: int, pin: bool, result: Path,
               comm_repeats: int = 5, sets: list[str] | tuple[str, ...] = (), gemm_floor: bool = False) -> int:
    """Time `steps` training steps of the job on every rank of MPI.COMM_WORLD; rank 0 writes `result` (JSON).

    Pinning happens before the trainer is built. After the kernel warm-up and WARMUP_STEPS untimed steps
    the phase timer is reset and the timed steps run between a barrier and the last step's end. Then the
    exchange is timed alone (`exchange_alone`), every rank's record is gathered once to rank 0 (lowercase
    gather: a small control message after timing), the allreduce is timed over MESSAGE_SIZES (P > 1) and
    rank 0 measures γ at the message size. With `gemm_floor` each rank also times the GEMMs its step runs
    (`measure.gemm_floor_step` without the first layer's input gradient, BLAS at the run's threads; median of
    `comm_repeats` after one untimed call): its record's gemm_floor_s, seconds per step, the BLAS part of
    the threaded compute term (`layoutmodel.py`).
    """
    from shardmill.parallel.comm import Comm, library
    from shardmill.parallel.exchange import blas_threads
    from shardmill.training.trainer import Trainer
    from shardmill.training.warmup import warm_up_kernels
    from threadpoolctl import threadpool_limits

    comm = Comm()
    pinned = pin_rank(comm.rank, threads) if pin else None
    job = load_job(job_path, overrides=sets)
    job.run.global_batch = global_batch
    job.run.threads = threads
    with threadpool_limits(limits=blas_threads(job, comm.size), user_api="blas"):
        trainer = Trainer(job, comm)
        compile_s = warm_up_kernels(trainer)
        per_epoch = trainer.sampler.steps_per_epoch
        for step in range(WARMUP_STEPS):
            trainer.step(*divmod(step, per_epoch))
        trainer.timer.reset()
        comm.barrier()
        begin = time.perf_counter()
        for step in range(WARMUP_STEPS, WARMUP_STEPS + steps):
            trainer.step(*divmod(step, per_epoch))  # wraps around the epoch when steps exceed it
        wall_s = time.perf_counter() - begin
        alone = exchange_alone(trainer, comm_repeats)
        floor = {"gemm_floor_s": median([gemm_floor_step(trainer, first_layer_dA=False)
                                         for _ in range(comm_repeats + 1)][1:])} if gemm_floor else {}
    rows = sum(part.size for part, _ in trainer.exchange.parts(trainer.sampler.batch(0, 0)))  # this rank's rows
    record = {
        "rank": comm.rank,
        "rows": rows,
        "wall_s": wall_s,
        "phase_s": trainer.timer.as_dict(),
        "compile_s": compile_s,
        "owned_params": trainer.exchange.owned_size,
        "optimizer_state_bytes": optimizer_state_bytes(trainer),
        **memory(),
        **placement(pinned),
        **floor,
    }
    records = comm.gather_object(record)
    dtype = trainer.model.dtype
    timings, skipped = time_allreduce(comm, MESSAGE_SIZES, comm_repeats, COMM_BUDGET_S, dtype) \
        if comm.size > 1 else ([], [])
    if comm.rank == 0:
        gamma_bytes = int(job.run.message_mib * 2**20)
        gamma = measure_reduction_gamma(gamma_bytes, repeats=comm_repeats, warmup=1, dtype=dtype)
        mpi = library()
        payload = {
            "p": comm.size,
            "global_batch": global_batch,
            "steps": steps,
            "warmup_steps": WARMUP_STEPS,
            "threads": threads,
            "params": trainer.model.n_params,
            "grad_bytes": trainer.model.n_params * dtype.itemsize,
            "itemsize": dtype.itemsize,
            "update": resolve_update(job, comm.size).update,  # run.update = "auto" decided for this P
            "reduction": job.run.reduction,
            "exact_format": job.run.exact_format,
            "exchange_alone": alone,
            "ranks": records,
            "allreduce": timings,
            "allreduce_skipped_bytes": skipped,
            "mpi_thread_level": mpi["mpi_thread_level"],
            "gamma_s_per_byte": gamma,
            "gamma_bytes": gamma_bytes,
            "mpi_library": " ".join(mpi["mpi_library"].split()),
            "mpi4py": mpi["mpi4py"],
        }
        partial = result.with_suffix(".tmp")
        partial.write_text(json.dumps(payload, allow_nan=False))
        partial.replace(result)
    comm.barrier()
    return 0


def worker_main(argv: list[str] | None = None) -> int:
    """Entry point of `python -m shardmill.scaling.worker` (started by the driver, one process per rank)."""
    parser = argparse.ArgumentParser(prog="python -m shardmill.scaling.worker",
                                     description="one run of a scaling study (started by `shardmill scale`)")
    parser.add_argument("--job", type=Path, required=True)
    parser.add_argument("--global-batch", type=int, required=True)
    parser.add_argument("--steps", type=int, required=True)
    parser.add_argument("--threads", type=int, default=1)
    parser.add_argument("--pin", action="store_true")
    parser.add_argument("--result", type=Path, required=True)
    parser.add_argument("--comm-repeats", type=int, default=5)
    parser.add_argument("--set", action="append", default=[], dest="sets")
    parser.add_argument("--gemm-floor", action="store_true")
    args = parser.parse_args(argv)
    from shardmill.parallel.comm import run_guarded

    return run_guarded(lambda: run_worker(args.job, args.global_batch, args.steps, args.threads, args.pin,
                                          args.result, args.comm_repeats, args.sets, args.gemm_floor),
                           user_errors=(JobError,))


if __name__ == "__main__":
    raise SystemExit(worker_main())
