"""How much of the gradient exchange hides behind compute: MPI's own Iallreduce against a communication thread.

Two ranks, one BLAS thread each. The compute phase stands in for a training step's backward: twelve float32 GEMMs
(256×1024)·(1024×1024) into a preallocated output. The exchange is the mid model's gradient (784-1024-1024-10,
1,863,690 float32 values, 7.45 MB) in the two messages ``MessageSum`` makes of it at 4 MB. Five contenders,
round-robin (which one goes first rotates), each repetition timed as the slowest rank's after a barrier, the fill
of the buffer outside the clock:

* ``exchange``: the messages' blocking in-place allreduces alone;
* ``compute``: the GEMMs alone;
* ``blocking``: compute, then the blocking allreduces (the step without overlap);
* ``iallreduce``: every message's ``Iallreduce`` started, compute, then ``Waitall`` (MPI's own progress);
* ``thread``: every message handed to the communication thread (``shardmill.parallel.commthread``), compute, wait;

and, for reference, ``thread_exchange``: the messages through the thread with no compute. Medians over the
repetitions. exposed = total − compute; hidden fraction = 1 − exposed / exchange (1: all hidden, 0: none, below 0:
overlapping costs more than it hides); ``hidden_possible`` = min(compute, exchange) / exchange, what perfect
overlap would give. ``with_over_without`` = total / blocking: the step with overlap against the step without. Every
exchange is checked exactly (small-integer fill).

Configurations, one mpiexec run each: ``shared_memory`` (as is), and ``shaped_link``: the ranks run in a private
network namespace of their own, whose loopback (MTU 1500, so that tbf never sees a packet above its burst) is
shaped with ``tc qdisc add dev lo root tbf rate 1gbit burst 64kb latency 50ms``; ``MPIR_CVAR_NOLOCAL=1`` and the
OFI netmod (``MPIR_CVAR_CH4_NETMOD=ofi``; UCX keeps its own shared memory and never touches the link) make MPICH
send through it. Both ranks' traffic shares that one queue. The bytes the queue sent are recorded. The namespace is
removed at the end; without root, ``ip`` or ``tc`` that part is skipped, with the reason in the JSON. Each also runs
with the library's own progress thread (``MPIR_CVAR_ASYNC_PROGRESS=1``), where ``iallreduce`` is the contender
that changes.

Usage: ``python benchmarks/overlap_hidden.py [--quick] [--rate 1gbit]``; prints one JSON object.
"""

from __future__ import annotations

import argparse
import os
import re
import shutil
import subprocess
import sys
from pathlib import Path
from typing import Any

import numpy as np
from benchsupport import MID_MODEL, LoadMeter, emit, last_json, log, machine_record
from shardmill.parallel.launch import mpiexec_command, rank_environment, run_command
from shardmill.timing import median, slowest_call
from threadpoolctl import threadpool_limits

GEMMS = 12
GEMM_SHAPE = (256, 1024, 1024)  # (rows, inner, columns): one layer's dW- or dA-sized product in float32
MESSAGE_MIB = 4.0  # MessageSum's default: two messages of the mid model
CONTENDERS = ("exchange", "compute", "blocking", "iallreduce", "thread", "thread_exchange")
SHAPED_ENVIRONMENT = {"MPIR_CVAR_NOLOCAL": "1", "MPIR_CVAR_CH4_NETMOD": "ofi"}
LIBRARY_PROGRESS = {"MPIR_CVAR_ASYNC_PROGRESS": "1"}
_LAUNCH_MARKERS = ("PMI_RANK", "PMI_SIZE", "PMIX_RANK", "OMPI_COMM_WORLD_SIZE", "MPI_LOCALNRANKS")


# -- under mpiexec: one configuration ---------------------------------------------------------------------------


def measure(repetitions: int, warmup: int) -> None:
    """Median seconds of every contender on this job's ranks, and the ratios; rank 0 prints them (JSON)."""
    from shardmill.model.mlp import MLP
    from shardmill.parallel.comm import Comm
    from shardmill.parallel.commthread import CommThread
    from shardmill.parallel.ownership import Replicated
    from shardmill.parallel.summation import MessageSum

    comm = Comm()
    thread = CommThread(comm)
    model = MLP(MID_MODEL, dtype="float32")
    grads = np.zeros_like(model.params)
    message_sum = MessageSum(comm, model, grads, Replicated(comm, grads.size), MESSAGE_MIB)
    messages = [grads[start:stop] for start, stop in message_sum.messages]
    base = (np.arange(grads.size) % 7 + 1).astype(np.float32)  # small integers: every sum exact
    fill, expected = base * (comm.rank + 1), base * (comm.size * (comm.size + 1) // 2)
    rows, inner, columns = GEMM_SHAPE
    rng = np.random.default_rng(comm.rank)
    A = rng.standard_normal((rows, inner), dtype=np.float32)
    W = rng.standard_normal((inner, columns), dtype=np.float32)
    out = np.empty((rows, columns), dtype=np.float32)

    def compute() -> None:
        for _ in range(GEMMS):
            np.matmul(A, W, out=out)

    def blocking_exchange() -> None:
        for message in messages:
            comm.allreduce_sum(message)

    def blocking() -> None:
        compute()
        blocking_exchange()

    def iallreduce() -> None:
        requests = [comm.start_allreduce_sum(message) for message in messages]
        compute()
        comm.wait(requests)

    def through_thread() -> None:
        handles = [thread.start_allreduce_sum(message) for message in messages]
        compute()
        thread.wait(handles)

    def thread_exchange() -> None:
        thread.wait([thread.start_allreduce_sum(message) for message in messages])

    rounds = dict(zip(CONTENDERS, (blocking_exchange, compute, blocking, iallreduce, through_thread,
                                   thread_exchange), strict=True))
    wrong = np.zeros(1, dtype=np.int64)

    def timed(name: str) -> float:
        np.copyto(grads, fill)
        seconds = slowest_call(comm, rounds[name])
        if name != "compute" and not np.array_equal(grads, expected):
            wrong[0] += 1
        return seconds

    meter = LoadMeter()
    seconds = {name: [] for name in CONTENDERS}
    with threadpool_limits(limits=1, user_api="blas"):
        for _ in range(warmup):
            for name in CONTENDERS:
                timed(name)
        for r in range(repetitions):
            for k in range(len(CONTENDERS)):  # round-robin: who goes first rotates
                name = CONTENDERS[(r + k) % len(CONTENDERS)]
                seconds[name].append(timed(name))
    thread.close()
    load = meter.stop(lambda own: float(comm.allreduce_sum(np.array([own]))[0]))
    comm.allreduce_sum(wrong)
    ms = {name: median(values) * 1e3 for name, values in seconds.items()}
    exchange, compute_ms = ms["exchange"], ms["compute"]

    def hidden(total: float) -> float:
        return 1.0 - (total - compute_ms) / exchange

    if comm.rank > 0:
        return
    emit({
        "processes": comm.size,
        "repetitions": repetitions,
        "warmup": warmup,
        "message_bytes": [message.nbytes for message in messages],
        "ms_median": ms,
        "ms_min": {name: float(np.min(values)) * 1e3 for name, values in seconds.items()},
        "hidden_iallreduce": hidden(ms["iallreduce"]),
        "hidden_thread": hidden(ms["thread"]),
        "hidden_possible": min(compute_ms, exchange) / exchange,
        "iallreduce_with_over_without": ms["iallreduce"] / ms["blocking"],
        "thread_with_over_without": ms["thread"] / ms["blocking"],
        "thread_exchange_over_exchange": ms["thread_exchange"] / exchange,
        "results_exact": int(wrong[0]) == 0,
        "load": load,
        "environment": {k: os.environ[k] for k in (*SHAPED_ENVIRONMENT, *LIBRARY_PROGRESS) if k in os.environ},
    })


# -- the driver: one mpiexec run per configuration ------------------------------------------------------------


def run_configuration(prefix: list[str], extra_env: dict[str, str], repetitions: int, warmup: int,
                      timeout: float) -> dict[str, Any]:
    """This script's measurement on 2 ranks (``prefix`` before mpiexec, e.g. ``ip netns exec NAME``); its JSON."""
    command = [*prefix, *mpiexec_command(2, [str(Path(__file__).resolve()), "--measure", "--repetitions",
                                             str(repetitions), "--warmup", str(warmup)])]
    env = rank_environment(threads=1) | extra_env
    try:
        done = run_command(command, env, timeout=timeout, stdout=subprocess.PIPE, stderr=subprocess.PIPE)
    except subprocess.TimeoutExpired:
        return {"error": f"timed out after {timeout:.0f} s", "command": command}
    if done.returncode != 0:
        return {"error": f"exit status {done.returncode}", "command": command, "stderr_tail": done.stderr[-2000:]}
    return last_json(done.stdout)


class ShapedLoopback:
    """A private network namespace whose loopback is rate-limited by tbf; removed on exit (context manager)."""

    def __init__(self, rate: str) -> None:
        self.name = f"shardmill-overlap-{os.getpid()}"
        self.rate = rate
        self.created = False

    @staticmethod
    def unavailable() -> str | None:
        """Why the namespace cannot be made here, or None."""
        if os.geteuid() != 0:
            return "needs root to create a network namespace (ip netns add)"
        missing = [tool for tool in ("ip", "tc") if shutil.which(tool) is None]
        if missing:
            return f"needs {' and '.join(missing)} (apt-get install -y iproute2)"
        return None

    def _run(self, *words: str) -> str:
        return subprocess.run(list(words), check=True, timeout=20, capture_output=True, text=True).stdout

    def inside(self, *words: str) -> str:
        return self._run("ip", "netns", "exec", self.name, *words)

    def __enter__(self) -> ShapedLoopback:
        self._run("ip", "netns", "add", self.name)
        self.created = True
        # MTU 1500: tbf drops any unsegmentable packet larger than its 64 kB burst, and lo's MTU is 64 kB.
        self.inside("ip", "link", "set", "lo", "mtu", "1500", "up")
        self.inside("tc", "qdisc", "add", "dev", "lo", "root", "tbf", "rate", self.rate, "burst", "64kb",
                    "latency", "50ms")
        return self

    def sent_bytes(self) -> int:
        """Bytes the shaped queue has sent since it was made (tc -s)."""
        found = re.search(r"Sent (\d+) bytes", self.inside("tc", "-s", "qdisc", "show", "dev", "lo"))
        return int(found.group(1)) if found else -1

    def __exit__(self, *exc_info: object) -> None:
        if self.created:
            subprocess.run(["ip", "netns", "del", self.name], timeout=20, check=False)


def summary(runs: dict[str, dict[str, Any]]) -> list[dict[str, Any]]:
    """One row per configuration. The library's progress thread spins all the time and slows the compute alone
    too, so its runs are also priced against the plain run on the same link (``…_against_plain``)."""
    keys = ("hidden_iallreduce", "hidden_thread", "hidden_possible", "iallreduce_with_over_without",
            "thread_with_over_without", "results_exact")
    rows = []
    for name, run in runs.items():
        if "ms_median" not in run:
            continue
        ms = run["ms_median"]
        row = {"configuration": name, "exchange_ms": ms["exchange"], "compute_ms": ms["compute"],
               **{k: run[k] for k in keys}}
        plain = runs.get(name.removesuffix("_library_progress"), {}).get("ms_median")
        if name.endswith("_library_progress") and plain:
            for contender in ("iallreduce", "thread"):
                row[f"hidden_{contender}_against_plain"] = 1.0 - (ms[contender] - plain["compute"]) / plain["exchange"]
                row[f"{contender}_over_plain_blocking"] = ms[contender] / plain["blocking"]
        rows.append(row)
    return rows


def main(argv: list[str] | None = None) -> int:
    argv = list(sys.argv[1:] if argv is None else argv)
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--quick", action="store_true", help="short smoke version (< 60 s)")
    parser.add_argument("--repetitions", type=int, default=None, help="timed repetitions (default 30, quick 5)")
    parser.add_argument("--warmup", type=int, default=None, help="untimed rounds first (default 3, quick 1)")
    parser.add_argument("--rate", default="1gbit", help="tc rate of the shaped loopback (default 1gbit)")
    parser.add_argument("--measure", action="store_true", help=argparse.SUPPRESS)  # under mpiexec: one configuration
    args = parser.parse_args(argv)
    repetitions = args.repetitions or (5 if args.quick else 30)
    warmup = args.warmup if args.warmup is not None else (1 if args.quick else 3)
    if args.measure or any(name in os.environ for name in _LAUNCH_MARKERS):
        measure(repetitions, warmup)
        return 0

    timeout = 120 if args.quick else 400
    runs: dict[str, dict[str, Any]] = {}
    for name, env in (("shared_memory", {}), ("shared_memory_library_progress", LIBRARY_PROGRESS)):
        log(f"{name}: 2 ranks, {repetitions} repetitions")
        runs[name] = run_configuration([], env, repetitions, warmup, timeout)
    shaped: dict[str, Any] = {"rate": args.rate, "burst": "64kb", "latency": "50ms", "mtu": 1500,
                              "environment": SHAPED_ENVIRONMENT}
    reason = ShapedLoopback.unavailable()
    if reason:
        shaped["skipped"] = reason
        log(f"shaped link skipped: {reason}")
    else:
        try:
            with ShapedLoopback(args.rate) as link:
                shaped["namespace"] = link.name
                for name, env in (("shaped_link", {}), ("shaped_link_library_progress", LIBRARY_PROGRESS)):
                    log(f"{name}: 2 ranks in {link.name}, loopback at {args.rate}")
                    before = link.sent_bytes()
                    runs[name] = run_configuration(["ip", "netns", "exec", link.name],
                                                   SHAPED_ENVIRONMENT | env, repetitions, warmup, timeout)
                    runs[name]["bytes_through_shaped_link"] = link.sent_bytes() - before
        except (subprocess.CalledProcessError, subprocess.TimeoutExpired, OSError) as err:
            detail = getattr(err, "stderr", "") or ""
            shaped["skipped"] = f"could not set up the shaped loopback: {err} {detail}".strip()
            log(shaped["skipped"])
    emit({
        "benchmark": "overlap_hidden",
        "quick": args.quick,
        "processes": 2,
        "compute": f"{GEMMS} float32 GEMMs {GEMM_SHAPE[0]}x{GEMM_SHAPE[1]} @ {GEMM_SHAPE[1]}x{GEMM_SHAPE[2]}",
        "exchange": f"mid model {MID_MODEL} float32 gradient, messages of >= {MESSAGE_MIB} MiB",
        "how": ("per contender: fill outside the clock; barrier; time; maximum over ranks; contenders round-robin; "
                "median over repetitions. hidden = 1 - (total - compute) / exchange; hidden_possible = "
                "min(compute, exchange) / exchange; with_over_without = total / (compute then blocking exchange); "
                "_against_plain: a library-progress total priced with the plain run's compute, exchange, blocking."),
        "shaped_link": shaped,
        "summary": summary(runs),
        "runs": runs,
        "machine": machine_record(),
    })
    return 0


if __name__ == "__main__":
    sys.exit(main())
