"""Run under ``mpiexec -n P``: collectives driven by the communication thread (``shardmill.parallel.commthread``).

Usage: ``python commthread_collectives.py MODE OUT.json``. MODE is one of

- ``sums``: for several rounds, the thread allreduces the messages of a gradient buffer while the main thread runs
  its own blocking allreduces of a copy on the world communicator; then a reduce-scatter and an allgather through
  the thread. Each rank checks its results against the blocking path and against sums it computes itself (every
  rank's fill is known everywhere: small integers, so every sum is exact in float32). Rank 0 writes the checks.
- ``main-raises``: rank 1 submits an allreduce the others join only a second later, then raises in the main
  thread while its own thread is inside that collective (the message says whether the handle was done).
- ``thread-raises``: rank 1's thread raises where the others' threads run an allreduce; rank 1 meets the error
  at its wait.

Everything runs inside ``run_guarded``, so a failure ends the whole job as in ``shardmill train``.
"""

from __future__ import annotations

import json
import sys
import time

import numpy as np
from shardmill.model.mlp import MLP
from shardmill.parallel.comm import Comm, run_guarded
from shardmill.parallel.commthread import CommThread
from shardmill.parallel.ownership import Replicated
from shardmill.parallel.summation import MessageSum

FAULTY_RANK = 1
ROUNDS = 8


def fill(rank: int, size: int, round_: int) -> np.ndarray:
    """Rank ``rank``'s gradient in round ``round_``: small integers (|v| ≤ 16), exact in any float32 sum."""
    rng = np.random.default_rng([rank, round_])
    return rng.integers(-16, 17, size=size).astype(np.float32)


def sums(comm: Comm, thread: CommThread, out: str) -> int:
    model = MLP([30, 40, 50, 20, 4], seed=0, dtype="float32")
    grads = np.zeros_like(model.params)
    # several messages of whole layers
    messages = MessageSum(comm, model, grads, Replicated(comm, grads.size), message_mib=0.004).messages
    checks: dict[str, bool] = {}
    for round_ in range(ROUNDS):
        grads[:] = fill(comm.rank, grads.size, round_)
        reference = grads.copy()
        handles = [thread.start_allreduce_sum(grads[start:stop]) for start, stop in messages]
        for start, stop in messages:  # the main thread's own collectives meanwhile, on the world communicator
            comm.allreduce_sum(reference[start:stop])
        thread.wait(handles)
        expected = sum(fill(r, grads.size, round_) for r in range(comm.size))  # independent: every fill is known
        checks[f"round {round_} equals blocking allreduce"] = bool(np.array_equal(grads, reference))
        checks[f"round {round_} equals local sum"] = bool(np.array_equal(grads, expected))

    counts = [grads.size // comm.size + (r < grads.size % comm.size) for r in range(comm.size)]
    lo = sum(counts[:comm.rank])
    send = fill(comm.rank, grads.size, ROUNDS)
    recv = np.zeros(counts[comm.rank], dtype=np.float32)
    thread.start_reduce_scatter_sum(send, recv, counts)
    gathered = np.zeros(grads.size, dtype=np.float32)
    gathered[lo:lo + counts[comm.rank]] = comm.rank + 1
    thread.submit(lambda duplicate: duplicate.allgather(gathered, counts), "allgather")
    thread.wait_all()
    total = sum(fill(r, grads.size, ROUNDS) for r in range(comm.size))
    checks["reduce_scatter equals local sum"] = bool(np.array_equal(recv, total[lo:lo + counts[comm.rank]]))
    checks["allgather equals rank numbers"] = bool(np.array_equal(gathered, np.repeat(
        np.arange(1, comm.size + 1, dtype=np.float32), counts)))
    thread.close()
    everyone = comm.gather_object(checks)
    if comm.rank == 0:
        with open(out, "w") as f:
            json.dump({"processes": comm.size, "messages": len(messages), "checks_by_rank": everyone}, f)
    return 0


def main_raises(comm: Comm, thread: CommThread) -> int:
    array = np.ones(1 << 16, dtype=np.float32)
    thread.wait([thread.start_allreduce_sum(array)])  # one collective through, so the thread is live everywhere
    if comm.rank != FAULTY_RANK:
        time.sleep(1.0)  # rank 1's thread waits inside the allreduce meanwhile
    handle = thread.start_allreduce_sum(array)
    if comm.rank == FAULTY_RANK:
        time.sleep(0.2)
        raise RuntimeError(f"planted failure in the main thread (handle done: {handle.done()})")
    thread.wait([handle])
    time.sleep(30)  # never reached past the wait: rank 1's abort ends the job first
    return 0


def thread_raises(comm: Comm, thread: CommThread) -> int:
    array = np.ones(1 << 16, dtype=np.float32)
    thread.wait([thread.start_allreduce_sum(array)])
    if comm.rank == FAULTY_RANK:
        def broken(_: Comm) -> None:
            raise ValueError("planted failure in the communication thread")
        handle = thread.submit(broken)
    else:
        handle = thread.start_allreduce_sum(array)  # waits for rank 1, which never joins
    thread.wait([handle])
    time.sleep(30)
    return 0


def main() -> int:
    mode, out = sys.argv[1], sys.argv[2]
    comm = Comm()
    thread = CommThread(comm)
    if mode == "sums":
        return sums(comm, thread, out)
    if mode == "main-raises":
        return main_raises(comm, thread)
    if mode == "thread-raises":
        return thread_raises(comm, thread)
    raise ValueError(f"MODE must be one of sums, main-raises, thread-raises; got {mode!r}")


if __name__ == "__main__":
    sys.exit(run_guarded(main))
