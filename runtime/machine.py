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
