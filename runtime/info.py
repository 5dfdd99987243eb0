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


def facts() -> dict[str, Any]:
    """What ``shardmill info --json`` prints: versions, MPI, cores, memory, BLAS pools and the Numba cache."""
    import mpi4py
    import numba
    import numpy as np
    import psutil
    from mpi4py import MPI
    from shardmill import __version__
    from threadpoolctl import threadpool_info

    return {
        "shardmill": __version__,
        "python": platform.python_version(),
        "python_executable": sys.executable,
        "numpy": np.__version__,
        "numba": numba.__version__,
        "mpi4py": mpi4py.__version__,
        "mpi_library": MPI.Get_library_version().splitlines()[0].strip(),
        "mpi_standard": ".".join(map(str, MPI.Get_version())),
        "world_size": MPI.COMM_WORLD.Get_size(),
        "cores_physical": psutil.cpu_count(logical=False),
        "cores_logical": psutil.cpu_count(),
        "memory_gib": psutil.virtual_memory().total / 2**30,
        "blas": [{"library": pool.get("internal_api"), "version": pool.get("version"),
                  "architecture": pool.get("architecture"), "threads": pool.get("num_threads")}
                 for pool in threadpool_info() if pool.get("user_api") == "blas"],
        "numba_cache": numba_cache_dir(),
    }


def cmd_info(as_json: bool = False) -> int:
    """``shardmill info``: :func:`facts` as aligned text lines, or as JSON with ``--json``."""
    found = facts()
    if as_json:
        import json

        print(json.dumps(found, indent=1))
        return 0
    lines = [
        f"shardmill {found['shardmill']}",
        f"python    {found['python']} ({found['python_executable']})",
        f"numpy     {found['numpy']}",
        f"numba     {found['numba']}",
        f"mpi4py    {found['mpi4py']}",
        f"MPI       {found['mpi_library']} (standard {found['mpi_standard']})",
        f"world     {found['world_size']} process(es)",
        f"cores     {found['cores_physical']} physical, {found['cores_logical']} logical",
        f"memory    {found['memory_gib']:.1f} GiB",
    ]
    for pool in found["blas"]:
        lines.append(f"BLAS      {pool['library']} {pool['version']} ({pool['architecture']}), {pool['threads']} "
                     f"thread(s) by default; shardmill uses run.threads (default 1)")
    lines.append(f"numba cache {found['numba_cache']}")
    print("\n".join(lines))
    return 0
