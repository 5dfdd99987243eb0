"""A run's workdir before training starts: one job at a time (the lock), a fresh start or a resume allowed.

Rank 0 looks at the files; every rank learns the outcome alike (``parallel.comm.lead_then_share``).
"""

from __future__ import annotations

import os
import shutil
import sys
from pathlib import Path
from typing import Any

from shardmill import checkpoint
from shardmill.checkpointkey import configured_key
from shardmill.errors import JobError
from shardmill.parallel.comm import Comm, lead_then_share


class WorkdirLock:
    """One job per workdir: rank 0 holds an exclusive lock on ``workdir/.shardmill.lock`` while the job runs.

    An advisory ``flock``: the kernel drops it when the process ends however it ends, so a killed job never
    blocks its own resume. A second job (another training, or a resume started while the first still runs) is
    refused on every rank before anything else happens.
    """

    def __init__(self, workdir: Path, comm: Comm) -> None:
        self.workdir, self.comm = workdir, comm
        self._file: Any = None
        self._created = False  # rank 0 made the folder: a job that fails before it trains leaves none behind

    def __enter__(self) -> WorkdirLock:
        lead_then_share(self.comm, self._lock)
        return self

    def _lock(self) -> None:
        import fcntl

        path = self.workdir / ".shardmill.lock"
        configured_key()  # a checkpoint key that cannot be used is refused before anything runs
        try:
            self._created = not self.workdir.exists()
            self.workdir.mkdir(parents=True, exist_ok=True)
            self._file = open(path, "a+")  # noqa: SIM115 - held open for the whole job
            fcntl.flock(self._file, fcntl.LOCK_EX | fcntl.LOCK_NB)
            self._file.seek(0)
            self._file.truncate()
            self._file.write(f"{os.getpid()}\n")
            self._file.flush()
            checkpoint.remove_stale(self.workdir / "checkpoints")  # an interrupted write's leftovers
            for stale in (*self.workdir.glob(".final.npz.tmp-*"), *self.workdir.glob(".best.npz.tmp-*")):
                stale.unlink(missing_ok=True)
        except BlockingIOError:
            self._file.seek(0)
            holder = self._file.read().strip() or "?"
            self._file.close()
            self._file = None
            raise JobError(f"`run.workdir` {str(self.workdir)!r} is in use by another shardmill job "
                           f"(process {holder}); wait for it to end or choose another `run.workdir`") from None
        except OSError as err:
            raise JobError(f"`run.workdir` {str(self.workdir)!r} cannot be used: {err.strerror or err}") from None

    def __exit__(self, exc_type: Any, *exc_info: object) -> None:
        if self._file is None:
            return
        if exc_type is not None and self._created and not checkpoint.holds_a_run(self.workdir):
            # A job refused before its first record (a bad column, a missing file) leaves no folder behind: only
            # the lock and an empty table cache can be in it. A finished table conversion is kept for the retry.
            (self.workdir / ".shardmill.lock").unlink(missing_ok=True)
            for folder in (self.workdir / "tables", self.workdir):
                try:
                    folder.rmdir()  # only when empty
                except OSError:
                    pass
        self._file.close()  # closing releases the lock


def newest_or_rebuilt(root: Path) -> str | None:
    """The newest checkpoint's name under ``root``; a missing index is first rebuilt from the step folders that
    verify, saying so in one line on stderr (rank 0 calls it). A damaged index raises CheckpointError."""
    if not root.is_dir():
        return None
    name = checkpoint.latest_name(root)
    if name is None and not (root / checkpoint.INDEX).exists() and any(root.glob("step-*")):
        entries, refused = checkpoint.rebuild_index(root)
        if entries:
            print(f"shardmill: note: {str(root / checkpoint.INDEX)!r} was missing; rebuilt it from the "
                  f"{len(entries)} step folder(s) that verify ({entries[0]['name']} … {entries[-1]['name']})"
                  + (f"; {len(refused)} refused, the newest: {refused[-1]}" if refused else ""),
                  file=sys.stderr, flush=True)
            name = entries[-1]["name"]
        elif refused:
            raise checkpoint.CheckpointError(f"{str(root / checkpoint.INDEX)!r} is missing and no step folder "
                                             f"verifies to rebuild it; the newest: {refused[-1]}")
    return name


def check_resumable(workdir: Path, comm: Comm) -> None:
    """Refuse --resume (every rank alike) when the workdir has no checkpoint to resume from; rebuild a missing
    index from the step folders that verify."""

    def check() -> None:
        root = workdir / "checkpoints"
        if not newest_or_rebuilt(root):  # a damaged index raises CheckpointError
            raise JobError(f"nothing to resume: no checkpoint under {str(root)!r}; start the run without --resume")

    lead_then_share(comm, check)


def continue_or_start(workdir: Path, comm: Comm) -> tuple[bool, bool]:
    """``train --continue``: (resume, fresh) for this workdir, decided by rank 0 and shared in one message.

    Resume when it holds a checkpoint. Otherwise start; an earlier attempt that never checkpointed left only records,
    which go (fresh), but a run's results (final.npz, best.npz) are never cleared: then the usual refusal follows.
    """

    def look() -> tuple[bool, bool]:
        root = workdir / "checkpoints"
        if newest_or_rebuilt(root):  # a damaged index raises CheckpointError
            return True, False
        results = (workdir / "final.npz").exists() or (workdir / "best.npz").exists()
        return False, not results

    resume, fresh = lead_then_share(comm, look, share=True)
    return bool(resume), bool(fresh)


def claim_workdir(workdir: Path, fresh: bool, comm: Comm) -> None:
    """A new run needs a workdir without an earlier run's files: refuse one (every rank alike), or clear it."""

    def claim() -> None:
        found = checkpoint.holds_a_run(workdir)
        if found and fresh:
            checkpoint.clear_run(workdir)
        elif found:
            raise JobError(f"`run.workdir` {str(workdir)!r} holds an earlier run ({found}); continue it with "
                           f"--resume (resume=True in Python), start over with --fresh (fresh=True), or choose "
                           f"another `run.workdir`")

    lead_then_share(comm, claim)


def forget_a_refused_start(workdir: Path, comm: Comm) -> None:
    """A new run refused before its first step (bad labels, a non-finite value) leaves no converted tables
    behind: the corrected data converts again, and nothing stale stays in the workdir. Collective (the refusal
    was raised alike on every rank); rank 0 removes ``workdir/tables``."""
    lead_then_share(comm, lambda: shutil.rmtree(workdir / "tables", ignore_errors=True))
