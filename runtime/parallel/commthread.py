"""A communication thread per rank: blocking collectives run in submission order while the main thread computes.

Why a thread: MPICH makes no progress on an ``Iallreduce`` while the rank's only thread is inside BLAS, so a
non-blocking collective started before the GEMMs still runs after them. A second thread that sits in a
*blocking* collective keeps the library progressing; numpy's GEMMs and mpi4py's calls both release the GIL, so
the two threads really run at once (MPI is initialised MPI_THREAD_MULTIPLE).

The thread owns a duplicate of the communicator (:meth:`Comm.duplicate`), so its collectives never match the
main thread's collectives on the original one. The ordering rule is the main thread's: every rank submits the
same collectives in the same order. Use::

    thread = CommThread(comm)                        # collective: every rank constructs it at the same point
    handle = thread.start_allreduce_sum(grads[a:b])  # returns at once; the thread sums the slice in place
    ...compute...
    thread.wait([handle])                            # or thread.wait_all(); raises what the thread raised
    thread.close()

A failure in the thread is kept and re-raised in the main thread by the next :meth:`CommThread.wait` (the same
exception object, with the thread's traceback and a note naming the operation); the operations queued after it
are skipped, since this rank's sequence of collectives is broken. A failure in the main thread goes through
``run_guarded`` → ``abort_world`` as always; the thread is a daemon, so it never holds the process up.
"""

from __future__ import annotations

import queue
import threading
from collections.abc import Callable, Iterable
from typing import Any

import numpy as np
from shardmill.parallel.comm import Comm, library

CLOSE_TIMEOUT_S = 30.0
"""Seconds :meth:`CommThread.close` waits for the thread to finish its queue before leaving it behind."""


class Handle:
    """One submitted operation: finished once :attr:`finished` is set, with ``result`` or ``error``."""

    __slots__ = ("name", "operation", "finished", "result", "error")

    def __init__(self, name: str, operation: Callable[[Comm], Any]) -> None:
        self.name = name
        self.operation = operation
        self.finished = threading.Event()
        self.result: Any = None
        self.error: BaseException | None = None

    def done(self) -> bool:
        """True once the thread has run (or skipped) this operation; never blocks."""
        return self.finished.is_set()


_STOP = None  # the queue item that ends the thread


class CommThread:
    """A daemon thread that runs the collectives submitted to it, one at a time, in order, on its own communicator.

    ``comm``: the communicator to duplicate (collective call). Every ``start_…`` method returns a :class:`Handle`
    at once; buffers passed in must not be touched by the main thread until their handle has been waited for.
    Submit and wait from one thread only (the rank's main thread): the order of submission is the order of the
    collectives. The duplicate communicator is not freed (comm.py has no ``free``); one per trainer is harmless.
    """

    def __init__(self, comm: Comm, name: str = "shardmill-comm") -> None:
        level = library()["mpi_thread_level"]
        if comm.size > 1 and level != "multiple":
            # Two threads calling MPI at once without MPI_THREAD_MULTIPLE corrupts the library's state.
            raise RuntimeError(f"a communication thread needs MPI initialised with MPI_THREAD_MULTIPLE; got {level}")
        self.comm = comm.duplicate()
        self._queue: queue.SimpleQueue = queue.SimpleQueue()
        self._last: Handle | None = None  # every earlier handle finishes before it (one thread, in order)
        self._failure: BaseException | None = None
        self._closed = False
        self._thread = threading.Thread(target=self._run, name=name, daemon=True)
        self._thread.start()

    # -- submitting -------------------------------------------------------------------------------------------

    def submit(self, operation: Callable[[Comm], Any], name: str | None = None) -> Handle:
        """Queue ``operation(comm)`` (comm: this thread's duplicate communicator); returns its handle at once."""
        if self._closed:
            raise RuntimeError("the communication thread is closed; no more operations can be submitted")
        handle = Handle(name or getattr(operation, "__name__", "operation"), operation)
        self._last = handle
        self._queue.put(handle)
        return handle

    def start_allreduce_sum(self, array: np.ndarray) -> Handle:
        """In-place SUM allreduce of a contiguous array (a message of ``grads``) on every rank."""
        return self.submit(lambda comm: comm.allreduce_sum(array), f"allreduce_sum of {array.size} values")

    def start_reduce_scatter_sum(self, send: np.ndarray, recv: np.ndarray, counts: list[int]) -> Handle:
        """SUM over ranks of ``send`` (sum(counts),); this rank's contiguous part (counts[rank],) into ``recv``."""
        return self.submit(lambda comm: comm.reduce_scatter_sum(send, recv, counts),
                           f"reduce_scatter_sum of {send.size} values")

    # -- waiting ----------------------------------------------------------------------------------------------

    def wait(self, handles: Iterable[Handle]) -> None:
        """Return once every handle has finished; raise the thread's failure if it has failed at any point."""
        for handle in handles:
            handle.finished.wait()
        if self._failure is not None:
            raise self._failure

    def wait_all(self) -> None:
        """Return once every operation submitted so far has finished (raises as :meth:`wait` does)."""
        self.wait([] if self._last is None else [self._last])

    def close(self, timeout: float | None = CLOSE_TIMEOUT_S) -> None:
        """Finish what was submitted, then end the thread and join it (at most ``timeout`` seconds: a thread
        stuck in a collective that a failed rank will never join is left behind, a daemon). Idempotent; raises
        nothing.

        Call it on every rank after the last wait (a failure not yet waited for is dropped here, not raised, so
        that ``close`` in a ``finally`` cannot hide the error that brought the rank there).
        """
        if self._closed:
            return
        self._closed = True
        self._queue.put(_STOP)
        self._thread.join(timeout)

    def __enter__(self) -> CommThread:
        return self

    def __exit__(self, exc_type: object, *exc_info: object) -> None:
        # On an exception the queued work may be waiting for a rank that is gone: do not wait for it.
        self.close(timeout=0.0 if exc_type is not None else CLOSE_TIMEOUT_S)

    # -- the thread -------------------------------------------------------------------------------------------

    def _run(self) -> None:
        while (handle := self._queue.get()) is not _STOP:
            if self._failure is None:
                try:
                    handle.result = handle.operation(self.comm)
                except BaseException as err:  # noqa: BLE001 - handed to the main thread at its next wait
                    # The exception keeps its own traceback (the thread's frames) when the main thread raises it.
                    err.add_note(f"raised in the communication thread ({threading.current_thread().name}) "
                                 f"while running {handle.name}")
                    self._failure = err
            # After a failure the rank's sequence of collectives is broken: skip, never run out of order.
            handle.error = self._failure
            handle.operation = None  # drop the buffers the closure holds
            handle.finished.set()
