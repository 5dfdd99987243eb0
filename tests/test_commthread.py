"""The communication thread (``shardmill.parallel.commthread``): order, results, failures, shutdown.

One process: the thread runs what it is given on another thread, one operation at a time in submission order
(MPI matches the collectives on a communicator by the order of the calls, MPI standard 4.0, collective
communication, "Correctness"; so order is the contract); an exception there reaches the main thread at its next
wait with the thread's traceback; ``close`` drains, joins and may be called twice. Under a real mpiexec (P = 2, 3):
sums driven by the thread while the main thread runs its own collectives equal a blocking allreduce and an
independent local sum exactly; a rank failing in either thread while the thread is inside a collective ends the
whole job within 30 s (as in test_failures.py).
"""

from __future__ import annotations

import json
import threading
import time
import traceback
from pathlib import Path

import numpy as np
import pytest
from helpers import run_mpi
from mpi4py import MPI
from shardmill.parallel.comm import Comm
from shardmill.parallel.commthread import CommThread

SCRIPT = Path(__file__).parent / "mpi_scripts" / "commthread_collectives.py"
LIMIT_S = 30.0  # a failing job must be over within 30 s (tests/test_failures.py)
HARD_TIMEOUT_S = 60.0


@pytest.fixture
def thread():
    comm_thread = CommThread(Comm(), name="test-comm")
    yield comm_thread
    comm_thread.close()


def test_thread_owns_a_duplicate_of_the_communicator(thread):
    # MPI standard 4.0, MPI_COMM_COMPARE: of a communicator and its MPI_COMM_DUP is MPI_CONGRUENT
    # (same group, different context, so their collectives never match each other).
    assert MPI.Comm.Compare(thread.comm.comm, MPI.COMM_WORLD) == MPI.CONGRUENT
    assert (thread.comm.rank, thread.comm.size) == (Comm().rank, Comm().size)


def test_operations_run_in_submission_order_on_another_thread(thread):
    seen: list[tuple[int, int]] = []

    def operation(k: int):
        def run(_: Comm) -> int:
            time.sleep(0.02 if k % 3 == 0 else 0.0)  # a slow one first must not let later ones overtake it
            seen.append((k, threading.get_ident()))
            return k * k
        return run

    handles = [thread.submit(operation(k)) for k in range(12)]
    thread.wait_all()
    assert [k for k, _ in seen] == list(range(12))  # MPI standard 4.0: collectives match in call order
    assert {ident for _, ident in seen} == {seen[0][1]} != {threading.get_ident()}  # one thread, not this one
    assert [h.result for h in handles] == [k * k for k in range(12)]  # common practice: the handle's value


def test_submit_returns_before_the_operation_runs(thread):
    started, release = threading.Event(), threading.Event()

    def blocked(_: Comm) -> str:
        started.set()
        release.wait(10)
        return "ran"

    handle = thread.submit(blocked)
    assert started.wait(10)  # the thread runs it while this thread goes on
    assert not handle.done()
    release.set()
    thread.wait([handle])
    assert handle.done() and handle.result == "ran"


def test_collectives_on_one_rank_give_the_sum_over_one_rank(thread):
    rng = np.random.default_rng(0)
    grads = rng.normal(size=1000).astype(np.float32)
    expected = grads.copy()  # a sum over one rank is the rank's own values (MPI standard 4.0, MPI_ALLREDUCE)
    send = rng.normal(size=10)
    recv = np.zeros(10)
    gathered = np.arange(7, dtype=np.float64)
    handles = [thread.start_allreduce_sum(grads[:400]), thread.start_allreduce_sum(grads[400:]),
               thread.start_reduce_scatter_sum(send, recv, [10]),
               thread.submit(lambda duplicate: duplicate.allgather(gathered, [7]), "allgather")]
    thread.wait(handles)
    np.testing.assert_array_equal(grads, expected)
    np.testing.assert_array_equal(recv, send)  # MPI standard 4.0, MPI_REDUCE_SCATTER: one rank gets it all
    np.testing.assert_array_equal(gathered, np.arange(7))


def test_an_exception_in_the_thread_is_raised_at_the_next_wait_with_its_traceback(thread):
    ran: list[str] = []

    def first(_: Comm) -> None:
        ran.append("first")

    def failing_in_the_thread(_: Comm) -> None:
        raise FloatingPointError("planted in the thread")

    def after(_: Comm) -> None:
        ran.append("after")

    ok, bad, skipped = thread.submit(first), thread.submit(failing_in_the_thread), thread.submit(after)
    with pytest.raises(FloatingPointError, match="planted in the thread") as caught:
        thread.wait([ok])  # the next wait raises, even one for a handle that succeeded
    text = "".join(traceback.format_exception(caught.value))
    assert "failing_in_the_thread" in text  # the thread's own frame is in the traceback
    assert "raised in the communication thread (test-comm) while running failing_in_the_thread" in text
    assert ran == ["first"]  # after a failure nothing more runs: the rank's order of collectives is broken
    assert ok.error is None and bad.error is skipped.error is caught.value
    with pytest.raises(FloatingPointError):
        thread.wait_all()  # and every later wait raises too


def test_close_finishes_queued_work_joins_and_is_idempotent():
    ran: list[int] = []
    thread = CommThread(Comm(), name="test-close")
    assert [t for t in threading.enumerate() if t.name == "test-close"][0].daemon  # never holds an abort up
    for k in range(5):
        thread.submit(lambda _, k=k: ran.append(k))
    thread.close()
    assert ran == [0, 1, 2, 3, 4]
    assert not [t for t in threading.enumerate() if t.name == "test-close"]  # joined
    thread.close()  # a second close does nothing
    thread.wait_all()  # everything submitted has finished
    with pytest.raises(RuntimeError, match="closed"):
        thread.start_allreduce_sum(np.zeros(3))


def test_close_after_a_failure_raises_nothing_and_the_context_manager_closes():
    def failing(_: Comm) -> None:
        raise ValueError("planted")

    with CommThread(Comm(), name="test-context") as thread:
        thread.submit(failing)
    assert not [t for t in threading.enumerate() if t.name == "test-context"]
    with pytest.raises(ValueError, match="planted"):
        thread.wait_all()


@pytest.mark.mpi
@pytest.mark.parametrize("P", [2, 3])
def test_thread_driven_sums_equal_blocking_allreduce_exactly(tmp_path, P):
    out = tmp_path / "checks.json"
    proc = run_mpi(P, [str(SCRIPT), "sums", str(out)], timeout=HARD_TIMEOUT_S)
    assert proc.returncode == 0, proc.stderr[-2000:]
    result = json.loads(out.read_text())
    assert result["processes"] == P and result["messages"] >= 2
    assert len(result["checks_by_rank"]) == P
    for rank, checks in enumerate(result["checks_by_rank"]):
        # Integers |v| ≤ 16·P are exact in float32 (IEEE 754 binary32: 24-bit significand), so the sums must
        # match the blocking allreduce and the local sum bit for bit whatever the reduction order.
        assert checks and all(checks.values()), (rank, [name for name, ok in checks.items() if not ok])


@pytest.mark.mpi
@pytest.mark.parametrize("P, mode, message", [
    (2, "main-raises", "planted failure in the main thread (handle done: False)"),
    (3, "main-raises", "planted failure in the main thread (handle done: False)"),
    (2, "thread-raises", "planted failure in the communication thread"),
    (3, "thread-raises", "planted failure in the communication thread"),
])
def test_a_rank_failing_while_the_thread_is_in_a_collective_ends_the_job(tmp_path, P, mode, message):
    begin = time.perf_counter()
    proc = run_mpi(P, [str(SCRIPT), mode, str(tmp_path / "unused.json")], timeout=HARD_TIMEOUT_S)
    seconds = time.perf_counter() - begin
    assert seconds < LIMIT_S
    assert proc.returncode != 0
    assert "[rank 1] failed" in proc.stderr and message in proc.stderr, proc.stderr[-2000:]
