"""When a kernel runs on threads: the process's kernel thread count, the size threshold, the main-thread rule.

A kernel with a parallel form (``threaded.py``, ``data.take_rows``) runs it when this process runs more than one
kernel thread (:func:`use_threads`: ``run.threads`` in fast mode, 1 in exact mode, whose threads take whole
chunks), the array holds at least :data:`MIN_ELEMENTS` values, and the caller is the main thread.

Threading layer: ``omp`` (GNU OpenMP) where Numba has it, else ``workqueue``; a ``NUMBA_THREADING_LAYER`` in
the environment wins. omp is safe for parallel loops started from several threads; workqueue is not, which the
main-thread rule makes moot. Neither is fork-safe, and nothing here forks after a parallel loop (ranks start with
mpiexec, subprocesses with fork + exec). Kernels: ``cache=True``, one specialisation per dtype of each driver.
"""

from __future__ import annotations

import importlib.util
import os
import threading

import numba

MIN_ELEMENTS = 262144
"""Arrays smaller than this run serial. Measured on the 2-core VM: alone, bias + ReLU forward of 65 536 float32
values took 13.2 µs on one thread and 9.0 on two, but inside the step of 16-128-128-5 (G = 512: 65 536 per hidden
layer) the two-thread kernels, between GEMMs, made the step 0.86 → 1.18 ms; 524 288 values (the mid model) gain
inside the step too (benchmarks/README.md)."""
BLOCK_ELEMENTS = 8192
"""Elements per block of the row-wise and flat kernels (whole rows: max(1, BLOCK_ELEMENTS // columns) rows)."""

# GNU OpenMP's spin count (GOMP_SPINCOUNT) and OpenBLAS's thread timeout are set when the package is imported,
# before numpy loads (shardmill/__init__.py, parallel.launch.THREAD_WAITS)
if "NUMBA_THREADING_LAYER" not in os.environ:
    numba.config.THREADING_LAYER = "omp" if importlib.util.find_spec("numba.np.ufunc.omppool") else "workqueue"

_threads = [1]  # this process's kernel threads (use_threads)
_MAIN = threading.main_thread()


def use_threads(threads: int) -> int:
    """Run the parallel kernels on ``threads`` threads (1: every kernel serial); returns the count Numba can give
    (at most its ``NUMBA_NUM_THREADS``, the machine's cores by default)."""
    count = max(1, min(int(threads), numba.config.NUMBA_NUM_THREADS))
    _threads[0] = count
    numba.set_num_threads(count)
    return count


def threads() -> int:
    """The kernel threads set by :func:`use_threads` (1 by default)."""
    return _threads[0]


def parallel(elements: int) -> bool:
    """Whether a kernel over ``elements`` values runs on the threads (see the module's dispatch rule)."""
    return _threads[0] > 1 and elements >= MIN_ELEMENTS and threading.current_thread() is _MAIN


def row_block(columns: int) -> int:
    """Rows per block of a row-wise kernel over ``columns`` columns: fixed by the shape alone, never by T."""
    return max(1, BLOCK_ELEMENTS // max(columns, 1))
