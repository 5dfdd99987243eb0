"""SIGTERM and SIGINT during training: noted by a handler, agreed after a step's sum, acted on after the step."""

from __future__ import annotations

import signal
import threading
from pathlib import Path
from typing import Any

_EARLY: list[int] = []  # a SIGTERM/SIGINT that arrived before StopSignals took over (note_early_signals)


def note_early_signals() -> None:
    """From a training process's first moment: remember a SIGTERM or SIGINT instead of dying of it.

    Between a rank's start and the training loop's own handlers lie the imports, the data and the kernels (seconds);
    a signal there used to end the rank at once (exit 15, and the MPI launcher's "bad termination" block). Noted
    here, it is handed to :class:`StopSignals`, so every rank stops together after the first step, with a
    checkpoint and the usual one line.
    """
    if threading.current_thread() is not threading.main_thread():
        return
    for signum in StopSignals.SIGNALS:
        signal.signal(signum, lambda received, frame: _EARLY.append(received))


class StopSignals:
    """Remember SIGTERM (what a batch system sends before its time limit) and SIGINT (Ctrl-C) during training.

    The handlers only note the signal; the step's agreement (:meth:`Trainer.agree`) shares it after every step's
    sum, and all ranks stop together after the same step, so a checkpoint can be written collectively.
    """

    SIGNALS = (signal.SIGTERM, signal.SIGINT)

    def __init__(self) -> None:
        self.received = 0
        self._previous: dict[int, Any] = {}

    def __enter__(self) -> StopSignals:
        self.received = _EARLY[0] if _EARLY else 0  # one that came while the process was starting
        if threading.current_thread() is threading.main_thread():  # handlers can only be set there
            for signum in self.SIGNALS:
                self._previous[signum] = signal.signal(signum, self._note)
        return self

    def __exit__(self, *exc_info: object) -> None:
        for signum, handler in self._previous.items():
            signal.signal(signum, handler)

    def _note(self, signum: int, frame: Any) -> None:
        self.received = self.received or signum


class TrainingStopped(Exception):
    """SIGTERM or SIGINT arrived during training: every rank finished its step and a checkpoint was written.

    ``exit_code`` is 128 + the signal number (143 for SIGTERM, 130 for SIGINT), as a shell reports it.
    """

    def __init__(self, signum: int, step: int, workdir: Path, overrides: tuple[str, ...] = ()) -> None:
        self.signum, self.step, self.workdir, self.overrides = signum, step, workdir, overrides
        super().__init__(self.message())
        self.exit_code = 128 + signum

    def message(self, job: str = "JOB", ranks: int | None = None) -> str:
        """The one line for the user: what stopped the run, where the checkpoint is, and the command that continues
        it (the job file's path, the run's own ``--set`` assignments and, when shardmill started the ranks, its
        ``--ranks``; any process count resumes)."""
        import shlex

        sets = "".join(f" --set {shlex.quote(text)}" for text in self.overrides)
        launch = f" --ranks {ranks}" if ranks else ""
        return (f"stopped by {signal.Signals(self.signum).name} after step {self.step}; checkpoint written under "
                f"{self.workdir / 'checkpoints'}; continue with `shardmill train {shlex.quote(job)} --resume{sets}"
                f"{launch}`")
