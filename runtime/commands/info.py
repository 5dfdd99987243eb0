"""``shardmill info``: what this installation runs on."""

from __future__ import annotations

import platform
import sys
from typing import Any

from shardmill.machine import numba_cache_dir, resident_bytes


def facts() -> dict[str, Any]:
    """What ``shardmill info --json`` prints: versions, MPI, cores, memory, BLAS pools, the Numba cache and this
    process's resident memory (MiB) once the libraries a training rank loads are loaded."""
    import numba
    import numpy as np
    import psutil
    from shardmill.parallel.comm import library
    from shardmill.version import __version__
    from threadpoolctl import threadpool_info

    mpi = library()
    return {
        "shardmill": __version__,
        "python": platform.python_version(),
        "python_executable": sys.executable,
        "numpy": np.__version__,
        "numba": numba.__version__,
        "mpi4py": mpi["mpi4py"],
        "mpi_library": mpi["mpi_library"],
        "mpi_standard": mpi["mpi_standard"],
        "world_size": mpi["world_size"],
        "cores_physical": psutil.cpu_count(logical=False),
        "cores_logical": psutil.cpu_count(),
        "memory_gib": psutil.virtual_memory().total / 2**30,
        "blas": [{"library": pool.get("internal_api"), "version": pool.get("version"),
                  "architecture": pool.get("architecture"), "threads": pool.get("num_threads")}
                 for pool in threadpool_info() if pool.get("user_api") == "blas"],
        "numba_cache": numba_cache_dir(),
        # after importing numpy, Numba, mpi4py and MPI: the floor under every training rank
        "resident_mib": resident_bytes() / 2**20,
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
    lines.append(f"resident  {found['resident_mib']:.0f} MiB in this process (numpy, Numba, MPI loaded)")
    print("\n".join(lines))
    return 0
