"""The few MPI operations the runtime needs, on numpy buffers (uppercase mpi4py methods, in place).

A world of size 1 needs no launcher (MPI singleton start). Every rank must call the same collectives in
the same order; nothing here branches on the rank around a collective.

Naming rule: a method is named after the MPI collective, then the reduction (``allreduce_sum``,
``reduce_scatter_sum``, ``allgather``); it works in place on numpy buffers unless it returns a new array
(``allgather_rows``); ``start_…`` returns a request; ``…_object`` moves a small picklable control message
(start-up and reports only, never in the step). Callers use these methods, never the mpi4py communicator.
"""

from __future__ import annotations

import os
import sys
import time
import traceback
import zlib
from collections.abc import Callable
from typing import Any, TypeVar

import numpy as np

# mpi4py's default, MPI_THREAD_MULTIPLE, is kept on purpose: with the MPICH wheel, single-thread mode measured
# 5.7 ms per 4 MB allreduce at P = 2 against 0.38 ms, and seconds per MB once ranks share a core.
from mpi4py import MPI
from shardmill.errors import JobError, LocalJobError

# Seconds a failing rank waits between writing its message and calling MPI_Abort. Hydra's launcher forwards a
# rank's stderr and its abort request on separate channels; when the abort wins, the message is lost and the
# user sees a bare exit code (seen once in CI: exit 2 with empty stderr). Half a second lets it drain.
ABORT_GRACE_S = 0.5

T = TypeVar("T")

_MPI_TYPES = {np.dtype(np.float32): MPI.FLOAT, np.dtype(np.float64): MPI.DOUBLE, np.dtype(np.int64): MPI.INT64_T,
              np.dtype(np.int32): MPI.INT32_T}


class Comm:
    """A communicator with in-place sums, non-blocking message reductions, max, broadcast and abort."""

    def __init__(self, comm: Any = None) -> None:
        self.comm = MPI.COMM_WORLD if comm is None else comm
        self.rank: int = self.comm.Get_rank()
        self.size: int = self.comm.Get_size()

    def spans_nodes(self) -> bool:
        """True, on every rank, when the ranks do not all share one node's memory (collective)."""
        if self.size == 1:
            return False
        node = self.comm.Split_type(MPI.COMM_TYPE_SHARED)
        alone = np.array([int(node.Get_size() < self.size)], dtype=np.int64)
        node.Free()
        return bool(self.allreduce_max(alone)[0])

    @classmethod
    def alone(cls) -> Comm:
        """This process by itself (MPI_COMM_SELF): a serial run inside a parallel job (``verify``)."""
        return cls(MPI.COMM_SELF)

    def duplicate(self) -> Comm:
        """A Comm over a duplicate of this communicator (MPI_Comm_dup): every rank calls it at the same point.

        Collectives on the duplicate never match collectives on this one, so a second thread (``progress.py``)
        can run its own sequence of collectives while this thread runs another (MPI_THREAD_MULTIPLE).
        """
        return Comm(self.comm.Dup())

    def split(self, color: int | None, key: int = 0) -> Comm | None:
        """Cut this communicator into disjoint ones (MPI_Comm_split; collective over this one): ranks giving the same
        ``color`` form one, ordered by ``key``; a rank giving None joins none and gets None."""
        part = self.comm.Split(MPI.UNDEFINED if color is None else color, key)
        return None if part == MPI.COMM_NULL else Comm(part)

    def send_object(self, obj: Any, dest: int, tag: int = 0, poll_s: float = 0.002) -> None:
        """Send a small control object to rank ``dest`` (never in the step), sleeping while it leaves."""
        self._idle_until(self.comm.isend(obj, dest=dest, tag=tag), poll_s)

    def poll_object(self, tag: int = 0) -> tuple[Any, int] | None:
        """A control object some rank sent with ``tag``, and its sender, when one has arrived; else None at once."""
        status = MPI.Status()
        if not self.comm.iprobe(source=MPI.ANY_SOURCE, tag=tag, status=status):
            return None
        source = status.Get_source()
        return self.comm.recv(source=source, tag=tag), source

    def receive_object(self, source: int, tag: int = 0, poll_s: float = 0.002) -> Any:
        """The next control object from rank ``source`` with ``tag``; waits sleeping, so a waiting rank leaves its
        core to the ranks still computing (a blocking MPI wait spins)."""
        while not self.comm.iprobe(source=source, tag=tag):
            time.sleep(poll_s)
        return self.comm.recv(source=source, tag=tag)

    def broadcast_idle(self, array: np.ndarray, root: int = 0, poll_s: float = 0.002) -> np.ndarray:
        """:meth:`broadcast` (MPI_Ibcast) whose waiting ranks sleep between looks instead of spinning."""
        if self.size > 1:
            self._idle_until(self.comm.Ibcast(self._buffer(array), root=root), poll_s)
        return array

    def barrier_idle(self, poll_s: float = 0.01) -> None:
        """:meth:`barrier` (MPI_Ibarrier) whose early ranks sleep between looks instead of spinning."""
        if self.size > 1:
            self._idle_until(self.comm.Ibarrier(), poll_s)

    @staticmethod
    def _idle_until(request: Any, poll_s: float) -> None:
        while not request.Test():
            time.sleep(poll_s)

    @staticmethod
    def _buffer(array: np.ndarray) -> list:
        if not array.flags.c_contiguous:
            raise ValueError("MPI buffers must be contiguous")
        return [array, _MPI_TYPES[array.dtype]]

    def allreduce_sum(self, array: np.ndarray) -> np.ndarray:
        """In-place SUM allreduce of a contiguous array; returns it."""
        if self.size > 1:
            self.comm.Allreduce(MPI.IN_PLACE, self._buffer(array), op=MPI.SUM)
        return array

    def start_allreduce_sum(self, array: np.ndarray) -> Any:
        """Start a non-blocking in-place SUM allreduce of a contiguous slice; returns a request (or None)."""
        if self.size == 1:
            return None
        return self.comm.Iallreduce(MPI.IN_PLACE, self._buffer(array), op=MPI.SUM)

    @staticmethod
    def wait(requests: list) -> None:
        """Wait for every request started by :meth:`start_allreduce_sum` or :meth:`start_reduce_scatter_sum`."""
        live = [r for r in requests if r is not None]
        if live:
            MPI.Request.Waitall(live)

    def allreduce_max(self, array: np.ndarray) -> np.ndarray:
        """In-place MAX allreduce."""
        if self.size > 1:
            self.comm.Allreduce(MPI.IN_PLACE, self._buffer(array), op=MPI.MAX)
        return array

    def allreduce_min(self, array: np.ndarray) -> np.ndarray:
        """In-place MIN allreduce."""
        if self.size > 1:
            self.comm.Allreduce(MPI.IN_PLACE, self._buffer(array), op=MPI.MIN)
        return array

    def broadcast(self, array: np.ndarray, root: int = 0) -> np.ndarray:
        """In-place broadcast from ``root``."""
        if self.size > 1:
            self.comm.Bcast(self._buffer(array), root=root)
        return array

    def reduce_scatter_sum(self, send: np.ndarray, recv: np.ndarray, counts: list[int]) -> np.ndarray:
        """SUM over ranks of ``send`` (sum(counts),), this rank's contiguous part (counts[rank],) into ``recv``.

        Rank r receives elements [sum(counts[:r]), sum(counts[:r+1])) of the sum: half the traffic of an
        allreduce, which is a reduce-scatter followed by an allgather.
        """
        if self.size == 1:
            recv[...] = send
        else:
            self.comm.Reduce_scatter(self._buffer(send), self._buffer(recv), counts, op=MPI.SUM)
        return recv

    def start_reduce_scatter_sum(self, send: np.ndarray, recv: np.ndarray, counts: list[int]) -> Any:
        """Start a non-blocking :meth:`reduce_scatter_sum` (``send`` and ``recv`` must not overlap); a request."""
        if self.size == 1:
            recv[...] = send
            return None
        return self.comm.Ireduce_scatter(self._buffer(send), self._buffer(recv), counts, op=MPI.SUM)

    def allgather(self, array: np.ndarray, counts: list[int]) -> np.ndarray:
        """In place: every rank's contiguous part of ``array`` (counts[rank] elements, in rank order) to all ranks."""
        if self.size > 1:
            offsets = np.cumsum([0] + counts[:-1]).tolist()
            self.comm.Allgatherv(MPI.IN_PLACE, [array, counts, offsets, _MPI_TYPES[array.dtype]])
        return array

    def allgather_rows(self, local: np.ndarray, counts: list[int]) -> np.ndarray:
        """Concatenate every rank's rows (rank order) on every rank. local: (counts[rank], m) float64."""
        m = local.shape[1]
        out = np.empty((sum(counts), m), dtype=local.dtype)
        if self.size == 1:
            out[...] = local
            return out
        sizes = [c * m for c in counts]
        offsets = [sum(sizes[:r]) for r in range(self.size)]
        self.comm.Allgatherv(self._buffer(np.ascontiguousarray(local)),
                             [out, sizes, offsets, _MPI_TYPES[local.dtype]])
        return out

    def broadcast_object(self, obj: Any, root: int = 0) -> Any:
        """Broadcast a small control object (start-up only, never in the step)."""
        return self.comm.bcast(obj, root=root) if self.size > 1 else obj

    def allgather_object(self, obj: Any) -> list[Any]:
        """Every rank's small control object, in rank order, on every rank (never in the step)."""
        return self.comm.allgather(obj) if self.size > 1 else [obj]

    def gather_object(self, obj: Any, root: int = 0) -> list[Any] | None:
        """Every rank's small control object, in rank order, on ``root`` (None elsewhere; never in the step)."""
        return self.comm.gather(obj, root=root) if self.size > 1 else [obj]

    def barrier(self) -> None:
        if self.size > 1:
            self.comm.Barrier()

    def all_equal(self, array: np.ndarray) -> bool:
        """True if ``array`` holds the same bytes on every rank (CRC-32 compared by MIN and MAX)."""
        crc = np.array([zlib.crc32(np.ascontiguousarray(array).view(np.uint8))], dtype=np.int64)
        low, high = self.allreduce_min(crc.copy()), self.allreduce_max(crc.copy())
        return bool(low[0] == high[0])

    def abort(self, code: int = 1) -> None:
        """End every rank of the job now (after :data:`ABORT_GRACE_S`, so this rank's messages get out)."""
        abort_world(code, self.comm)


THREAD_LEVELS = {MPI.THREAD_SINGLE: "single", MPI.THREAD_FUNNELED: "funneled", MPI.THREAD_SERIALIZED: "serialized",
                 MPI.THREAD_MULTIPLE: "multiple"}
"""MPI's thread support levels as words."""


def library() -> dict[str, Any]:
    """The MPI this process runs on: mpi4py's version, the library's first line, the standard, the thread level
    it was initialised with (a word of :data:`THREAD_LEVELS`) and the world's size."""
    import mpi4py

    return {"mpi4py": mpi4py.__version__, "mpi_library": MPI.Get_library_version().splitlines()[0].strip(),
            "mpi_standard": ".".join(map(str, MPI.Get_version())),
            "mpi_thread_level": THREAD_LEVELS.get(MPI.Query_thread(), str(MPI.Query_thread())),
            "world_size": MPI.COMM_WORLD.Get_size()}


def abort_world(code: int, comm: Any = None) -> None:
    """Flush this rank's output, give the launcher :data:`ABORT_GRACE_S` seconds to forward it, then MPI_Abort."""
    sys.stdout.flush()
    sys.stderr.flush()
    time.sleep(ABORT_GRACE_S)
    (MPI.COMM_WORLD if comm is None else comm).Abort(code)


LAUNCHER_SIZES = (
    ("PMI_SIZE", "the PMI launcher (mpiexec, or srun --mpi=pmi2)"),
    ("OMPI_COMM_WORLD_SIZE", "Open MPI's mpirun"),
    ("MV2_COMM_WORLD_SIZE", "MVAPICH's launcher"),
    ("SLURM_STEP_NUM_TASKS", "Slurm's srun"),
)
"""Environment variables in which a launcher announces how many processes it started, in the order they are
believed: an MPI launcher's own count first; Slurm's count of the job step's tasks last, because under mpiexec
inside an allocation the ranks inherit the count of the step that started mpiexec's proxies."""


def announced_size(environ: dict[str, str] | None = None) -> tuple[int, str] | None:
    """(process count, variable) that this process's launcher announced, or None when no launcher said one."""
    environ = os.environ if environ is None else environ
    for name, _ in LAUNCHER_SIZES:
        text = environ.get(name, "").strip()
        if text.isdigit() and int(text) > 0:
            return int(text), name
    return None


def check_world(size: int, environ: dict[str, str] | None = None) -> None:
    """Refuse, on every rank alike, a world whose size is not the process count its launcher announced.

    Without this, ``srun -n 4 --mpi=none`` (or an mpi4py built against another MPI than the launcher's) starts four
    worlds of one process each, and each trains alone. Every process reads its own environment and its own world
    size, so each one stops by itself, before any collective.
    """
    announced = announced_size(environ)
    if announced is None or announced[0] == size:
        return
    count, name = announced
    who = dict(LAUNCHER_SIZES)[name]
    raise JobError(f"{who} started {count} processes ({name}={count}), but this one's MPI world holds {size}: the "
                   f"processes did not join one MPI job. Under Slurm start the ranks with `srun --mpi=pmi2` (the "
                   f"MPICH that pip installs speaks PMI-2); with another launcher use the mpiexec of the MPI that "
                   f"mpi4py was built against (`shardmill info` names it)")


def run_guarded(main: Callable[[], int], user_errors: tuple[type[BaseException], ...] = ()) -> int:
    """Run ``main`` so that a failure on any rank ends the whole job with a non-zero exit.

    A user error (bad job, bad data) raised identically on every rank before any collective is printed
    once, by rank 0, and every rank exits with status 2. Any other exception is printed with the rank and
    a traceback, and ``MPI_Abort`` ends every rank (no rank is left waiting in a collective).
    """
    comm = MPI.COMM_WORLD
    rank, size = comm.Get_rank(), comm.Get_size()
    try:
        check_world(size)
        return main()
    except user_errors as err:
        local = isinstance(err, LocalJobError)  # seen by this rank only: the others may be waiting for it
        if rank == 0 or local:
            prefix = f"[rank {rank}] " if size > 1 and local else ""
            print(f"shardmill: error: {prefix}{err}", file=sys.stderr, flush=True)
        if local and size > 1:
            abort_world(2, comm)
        return 2
    except BrokenPipeError:
        # The reader of our output went away (`shardmill … | head`): nothing more to say to it. Point stdout at
        # /dev/null so the exit's flush cannot fail again (Python's signal docs), and end like SIGPIPE would.
        os.dup2(os.open(os.devnull, os.O_WRONLY), sys.stdout.fileno())
        if size > 1:
            abort_world(141, comm)
        return 141
    except KeyboardInterrupt:
        print(f"shardmill: [rank {rank}] interrupted", file=sys.stderr, flush=True)
        if size > 1:
            abort_world(130, comm)
        return 130
    except BaseException as err:  # noqa: BLE001 - any failure must end the job
        if isinstance(err, SystemExit) and not err.code:
            raise
        text = "".join(traceback.format_exception(err))
        print(f"shardmill: [rank {rank}] failed: {err!r}\n{text}", file=sys.stderr, flush=True)
        if size > 1:
            abort_world(1, comm)
        return 1


def share_error(comm: Comm, error: Exception | None) -> None:
    """Start-up check point: if ``error`` is set on any rank, every rank raises the same JobError.

    Used where a failure can be local to one rank (a file missing on one node, a bad row in one shard).
    The message names the first failing rank. Small control message (lowercase allgather), start-up only.
    """
    if comm.size == 1:
        if error is not None:
            raise error
        return
    messages = comm.allgather_object(None if error is None else str(error))
    failed = [(r, m) for r, m in enumerate(messages) if m is not None]
    if failed:
        rank, text = failed[0]
        raise JobError(f"[rank {rank}] {text}")


def lead_then_share(comm: Comm, work: Callable[[], T], share: bool = False) -> T | None:
    """Rank 0 does ``work()``; every rank learns the outcome (start-up and checkpoint time, never in the step).

    A :class:`JobError` that ``work`` raises is raised on every rank alike (through :func:`share_error`: the error
    itself on one rank, a JobError naming rank 0 on several); ``work`` maps other failures it expects (an OSError) to a
    JobError itself. Returns rank 0's result on rank 0 and None elsewhere, or, with ``share``, rank 0's result on
    every rank (a small picklable control object, broadcast).
    """
    result: T | None = None
    error: Exception | None = None
    if comm.rank == 0:
        try:
            result = work()
        except JobError as err:
            error = err
    share_error(comm, error)
    return comm.broadcast_object(result) if share else result
