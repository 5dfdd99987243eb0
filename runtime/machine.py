"""The machine a number came from, and where Numba keeps its compiled kernels."""

from __future__ import annotations

import os
import platform
from typing import Any


def machine() -> dict[str, Any]:
    """What the numbers came from: CPU, cores, BLAS library, Python and numpy versions."""
    import numpy as np
    from threadpoolctl import threadpool_info

    blas = [i for i in threadpool_info() if i.get("user_api") == "blas"]
    return {
        "cpu": platform.processor() or platform.machine(),
        "cores": os.cpu_count(),
        "python": platform.python_version(),
        "numpy": np.__version__,
        "blas": [f"{i.get('internal_api')} {i.get('version')} ({i.get('architecture')})" for i in blas],
        "node": platform.node(),
    }


def resident_bytes() -> int:
    """This process's resident set size now, bytes (psutil: the kernel's count of pages in memory)."""
    import psutil

    return int(psutil.Process().memory_info().rss)


def numba_cache_dir() -> str:
    """Where Numba keeps compiled kernels: NUMBA_CACHE_DIR if set, else __pycache__ beside kernels/."""
    from numba.core import config
    from shardmill import kernels

    if config.CACHE_DIR:
        return str(config.CACHE_DIR)
    return os.path.join(os.path.dirname(kernels.__file__), "__pycache__")


class OtherLoad:
    """How much of the machine other processes used while a run of ours went on: start it, run, then
    :meth:`fraction`.

    The machine's busy CPU seconds come from /proc/stat (every core's time but idle and I/O wait; steal, the
    hypervisor's, counts as others');
    ours are this process's and its waited-for descendants' (``getrusage``: mpiexec and the ranks it waited for).
    fraction = (machine busy − ours) / (wall seconds · cores), clipped to [0, 1]; None where /proc/stat is absent.
    """

    def __init__(self) -> None:
        self.start = self.sample()

    @staticmethod
    def sample() -> tuple[float, float, float] | None:
        """(machine busy CPU seconds, our CPU seconds, monotonic seconds) now, or None without /proc/stat."""
        import time

        try:
            import resource  # Unix only

            with open("/proc/stat") as stat:
                fields = stat.readline().split()
        except (ImportError, OSError):
            return None
        if not fields or fields[0] != "cpu":
            return None
        ticks = [int(v) for v in fields[1:9]]  # user nice system idle iowait irq softirq steal
        busy = (sum(ticks) - ticks[3] - ticks[4]) / os.sysconf("SC_CLK_TCK")  # all but idle and iowait
        ours = sum(u.ru_utime + u.ru_stime for u in (resource.getrusage(resource.RUSAGE_SELF),
                                                     resource.getrusage(resource.RUSAGE_CHILDREN)))
        return busy, ours, time.monotonic()

    def fraction(self) -> float | None:
        """Share of all cores' time since the start that other processes used, in [0, 1]; None if unknown."""
        end = self.sample()
        if self.start is None or end is None:
            return None
        return other_fraction(end[0] - self.start[0], end[1] - self.start[1], end[2] - self.start[2],
                              os.cpu_count() or 1)


def other_fraction(busy_s: float, ours_s: float, wall_s: float, cores: int) -> float:
    """(busy_s − ours_s) / (wall_s · cores), clipped to [0, 1]: the machine's busy CPU seconds that were not ours,
    as a share of every core's time over wall_s seconds (0 for a run of no duration)."""
    if wall_s <= 0 or cores < 1:
        return 0.0
    return min(1.0, max(0.0, (busy_s - ours_s) / (wall_s * cores)))
