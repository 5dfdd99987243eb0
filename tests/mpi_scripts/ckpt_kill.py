"""Run under ``mpiexec -n P``: train a job and SIGKILL rank 0 halfway through writing its second checkpoint.

Usage: ``python ckpt_kill.py JOB.toml``. ``shardmill.checkpoint._write_npz`` is wrapped so that its third call
(the first checkpoint writes params.npz and optimizer.npz, the second starts with params.npz) writes only the
first half of the archive's bytes, flushes them to disk and then kills the process with SIGKILL: no Python
cleanup, no ``finally`` blocks, exactly like a node failure. If the kill never happens the script exits 3.
"""

from __future__ import annotations

import io
import os
import signal
import sys
from pathlib import Path

import numpy as np
from shardmill import checkpoint
from shardmill.config import load_job
from shardmill.parallel.comm import Comm
from shardmill.training.loop import train

calls = 0
original = checkpoint._write_npz


def dying_write(path: Path, arrays: dict[str, np.ndarray]) -> None:
    global calls
    calls += 1
    if calls < 3:
        original(path, arrays)
        return
    buffer = io.BytesIO()
    np.savez(buffer, **arrays)
    data = buffer.getvalue()
    with open(path, "wb") as f:
        f.write(data[: len(data) // 2])
        f.flush()
        os.fsync(f.fileno())
    os.kill(os.getpid(), signal.SIGKILL)


def main() -> None:
    checkpoint._write_npz = dying_write
    train(load_job(sys.argv[1]), Comm(), progress=False)
    sys.exit(3)


if __name__ == "__main__":
    main()
