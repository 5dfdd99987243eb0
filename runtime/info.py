"""``shardmill info``: what this installation runs on."""

from __future__ import annotations

import os
import platform
import sys
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


def numba_cache_dir() -> str:
    """Where Numba keeps compiled kernels: NUMBA_CACHE_DIR if set, else __pycache__ beside kernels/."""
    from numba.core import config
    from shardmill import kernels

    if config.CACHE_DIR:
        return str(config.CACHE_DIR)
    return os.path.join(os.path.dirname(kernels.__file__), "__pycache__")


def cmd_info() -> int:
    import mpi4py
    import numba
    import numpy as np
    import psutil
    from mpi4py import MPI
    from shardmill import __version__
    from threadpoolctl import threadpool_info

    lines = [
        f"shardmill {__version__}",
        f"python    {platform.python_version()} ({sys.executable})",
        f"numpy     {np.__version__}",
        f"numba     {numba.__version__}",
        f"mpi4py    {mpi4py.__version__}",
        f"MPI       {MPI.Get_library_version().splitlines()[0].strip()} "
        f"(standard {'.'.join(map(str, MPI.Get_version()))})",
        f"world     {MPI.COMM_WORLD.Get_size()} process(es)",
        f"cores     {psutil.cpu_count(logical=False)} physical, {psutil.cpu_count()} logical",
        f"memory    {psutil.virtual_memory().total / 2**30:.1f} GiB",
    ]
    for pool in threadpool_info():
        if pool.get("user_api") == "blas":
            lines.append(f"BLAS      {pool.get('internal_api')} {pool.get('version')} ({pool.get('architecture')}), "
                         f"{pool.get('num_threads')} thread(s) by default; shardmill uses run.threads (default 1)")
    lines.append(f"numba cache {numba_cache_dir()}")
    print("\n".join(lines))
    return 0
