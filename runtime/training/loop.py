"""The run loop: ``train(job)`` on every rank, from the workdir's lock to final.npz.

In order: lock and claim the workdir (``workdir.py``), build the trainer, warm up its kernels, resume, then step
(:meth:`Trainer.step`) with the checks the run asks for (``run.check_every``), epoch records and early stopping
(``records.py``, ``best.py``), checkpoints (``saving.py``) by step count, epoch, clock or a new best, and a stop
on SIGTERM/SIGINT (``signals.py``) after a checkpoint; rank 0 prints (``console.py``).
"""

from __future__ import annotations

import time
from typing import Any

import numpy as np
from shardmill import checkpoint
from shardmill.config import Job
from shardmill.data.dataset import Arrays
from shardmill.errors import JobError
from shardmill.parallel.comm import Comm
from shardmill.parallel.exchange import blas_threads
from shardmill.training import saving
from shardmill.training.console import Console, compiling_notice, kernels_cached, kernels_ready, say
from shardmill.training.health import HealthWatch
from shardmill.training.records import append, early_stop_record, epoch_record, start_record, write_health
from shardmill.training.signals import StopSignals, TrainingStopped
from shardmill.training.trainer import StepFlags, Trainer
from shardmill.training.warmup import warm_up_kernels
from shardmill.training.workdir import (
    WorkdirLock,
    check_resumable,
    claim_workdir,
    continue_or_start,
    forget_a_refused_start,
)
from threadpoolctl import threadpool_limits


def train(job: Job, comm: Comm | None = None, resume: bool | str = False, progress: bool = True,
          echo: bool = False, fresh: bool = False, arrays: Arrays | None = None) -> dict[str, Any]:
    """Train ``job`` on every rank of ``comm`` (MPI.COMM_WORLD by default).

    ``resume``: True continues the workdir's run from its newest checkpoint (refused without one); "auto" does so
    when the workdir holds a checkpoint and otherwise starts anew, clearing what an earlier attempt without any
    checkpoint left (``train --continue``: a batch job submitted again, or requeued, needs no edit).

    Rank 0 writes ``workdir/metrics.jsonl`` (one JSON object per epoch), checkpoints and
    ``workdir/final.npz`` (arrays W0, b0, W1, b1, …). Returns a summary dict on every rank, including
    the final model under ``"model"``. ``echo``: rank 0 prints each epoch's line as the epoch ends (flushed, so a
    batch log shows it at once) and, without a progress bar, a heartbeat line every ``console.HEARTBEAT_S`` seconds.
    ``arrays``: the data in memory (``data/dataset.py`` :class:`Arrays`) instead of the job's data files.
    """
    comm = comm or Comm()
    with WorkdirLock(job.workdir, comm):
        if resume == "auto":
            resume, clear = continue_or_start(job.workdir, comm)
            fresh = fresh or clear
        if resume:
            check_resumable(job.workdir, comm)  # before the data is read (a table may take a while to convert)
        else:
            claim_workdir(job.workdir, fresh, comm)
        # a diverging run overflows on its way to the non-finite loss that stops it in words (Diverged): numpy's
        # warnings would only print ahead of that line
        with threadpool_limits(limits=blas_threads(job, comm.size), user_api="blas"), StopSignals() as stop, \
                np.errstate(over="ignore", invalid="ignore", divide="ignore"):
            try:
                trainer = Trainer(job, comm, arrays=arrays)
            except JobError:
                if not resume:
                    forget_a_refused_start(job.workdir, comm)
                raise
            trainer.flags = LoopFlags(stop, job.run.save_minutes, comm.rank == 0)
            return RunLoop(trainer, resume, progress, echo).run()


class LoopFlags(StepFlags):
    """The loop's part of each step's agreement: a stop signal noted on this rank, and rank 0's checkpoint clock
    (``run.save_minutes``; 0: off)."""

    def __init__(self, signals: StopSignals, save_minutes: float, lead: bool) -> None:
        super().__init__()
        self.signals, self.save_minutes, self.lead = signals, save_minutes, lead
        self.last_save = time.perf_counter()

    def local(self) -> tuple[int, bool]:
        minutes = self.save_minutes
        due = bool(minutes) and self.lead and time.perf_counter() - self.last_save >= 60.0 * minutes
        return self.signals.received, due


class RunLoop:
    """One run segment on one rank (a fresh start or a resume): where it is, what it logged, what it prints."""

    def __init__(self, trainer: Trainer, resume: bool, progress: bool, echo: bool) -> None:
        self.trainer, self.resume, self.progress, self.echo = trainer, resume, progress, echo
        self.lead = trainer.comm.rank == 0
        self.metrics_path = trainer.job.workdir / "metrics.jsonl"
        self.steps_per_epoch = trainer.sampler.steps_per_epoch
        self.history: list[dict[str, Any]] = []  # the epoch and early-stop records of this segment
        self.compile_s = 0.0
        self.step = self.total = 0  # global steps done; the step this segment ends at
        self.epoch_begin, self.epoch_steps = 0.0, 0  # when the current epoch began, and its steps so far
        self.improved = False  # the last epoch's model is the best so far
        self.stopped_early = False
        self.watch = HealthWatch(trainer.job.run.health_every)  # diagnostics around the watched steps
        self.console: Console | None = None

    def run(self) -> dict[str, Any]:
        """Warm up, resume, step to the end (or an early stop or a signal); the summary of :func:`train`."""
        trainer, job = self.trainer, self.trainer.job
        if self.echo and self.lead and not kernels_cached():
            compiling_notice(trainer.model.dtype.name)
        self.compile_s = warm_up_kernels(trainer)
        if self.echo and self.lead and self.compile_s > 1.0:
            kernels_ready(self.compile_s)
        self.step = saving.resume(trainer) if self.resume else 0
        self.check_start()
        if self.resume and self.echo and self.lead:
            epoch, in_epoch = divmod(self.step, self.steps_per_epoch)
            where = (f"the end of epoch {epoch}" if in_epoch == 0 else
                     f"epoch {epoch + 1}, step {in_epoch} of {self.steps_per_epoch}")
            done = "; the run is complete, final.npz is written again" if self.step >= trainer.total_steps else ""
            print(f"continuing from the checkpoint of step {self.step} ({where}) in {job.workdir / 'checkpoints'}"
                  f"{done}", flush=True)
        if self.lead:
            job.workdir.mkdir(parents=True, exist_ok=True)
            append(self.metrics_path, start_record(trainer, self.step))
        self.total = trainer.total_steps
        self.settle_a_resumed_stop()
        self.stopped_early = trainer.best is not None and trainer.best.stopped  # already, on a resume (see above)
        console = self.console = Console(self.total, self.step, job.run.global_batch, self.lead, self.progress,
                                         self.echo)
        self.epoch_begin = time.perf_counter()
        while self.step < self.total:
            epoch, in_epoch = divmod(self.step, self.steps_per_epoch)
            self.watch.before_step(trainer)
            trainer.step(epoch, in_epoch)
            self.watch.after_step(trainer)
            self.check_drift()
            self.step += 1
            self.epoch_steps += 1
            console.step_done(self.step)
            end_of_epoch = self.step % self.steps_per_epoch == 0 or self.step == self.total
            if self.watch.records:
                write_health(self.watch.records, self.metrics_path, self.lead)
            self.improved = False
            if end_of_epoch:
                self.end_epoch(epoch)
            if self.step >= self.total or self.stopped_early:
                break  # the final checkpoint follows the loop
            signum = trainer.flags.stop_signal
            if self.improved or signum or trainer.flags.checkpoint_due or self.save_due(end_of_epoch):
                self.save(best=self.improved)  # by step count, at each epoch end by default, by the clock, for a
                # new best model, or before stopping
            if signum:  # every rank finished this step and the checkpoint is written: leave together
                console.close()
                trainer.close()
                raise TrainingStopped(signum, self.step, job.workdir, job.overrides)
        console.close()
        return self.finish()

    def check_start(self) -> None:
        """Refuse a checkpoint past this job's last step (the same on every rank: its step was broadcast)."""
        trainer, run = self.trainer, self.trainer.job.run
        if self.step <= trainer.total_steps:
            return
        limit = (f"run.max_steps = {run.max_steps}" if run.max_steps and run.max_steps < run.epochs *
                 self.steps_per_epoch else f"run.epochs = {run.epochs} of {self.steps_per_epoch} steps")
        raise JobError(f"the checkpoint is at step {self.step}, past this job's last step {trainer.total_steps} "
                       f"({limit}); raise it to continue (e.g. --set run.epochs=…)")

    def settle_a_resumed_stop(self) -> None:
        """A resume of a run that had stopped early, or whose smaller run.patience is reached already, ends here."""
        best = self.trainer.best
        if best is None or not best.should_stop:
            return
        self.total = self.step
        if best.stopped:
            if self.echo and self.lead:
                print(f"already stopped early at step {self.step}: {best.metric} had not improved for "
                      f"{best.stale_epochs} epochs (run.patience = {best.patience}); raise run.patience to go on",
                      flush=True)
        else:
            self.stop_early(self.step // self.steps_per_epoch, f"early stop at once: {best.metric} has not improved "
                            f"for {best.stale_epochs} epochs, which reaches run.patience = {best.patience}")

    def check_drift(self) -> None:
        """Every ``run.check_every`` steps: every rank must hold the same parameters (collective)."""
        trainer, every = self.trainer, self.trainer.job.run.check_every
        if every and trainer.step_count % every == 0 and not trainer.comm.all_equal(trainer.model.params):
            raise RuntimeError(f"parameters drifted apart across ranks at step {trainer.step_count}")

    def end_epoch(self, epoch: int) -> None:
        """The epoch record (collective), the best model's bookkeeping, rank 0's line, and maybe an early stop."""
        trainer, best = self.trainer, self.trainer.best
        record = epoch_record(trainer, epoch, self.step, self.epoch_steps, time.perf_counter() - self.epoch_begin,
                              self.compile_s)
        if best is not None and self.step % self.steps_per_epoch == 0:  # whole epochs only, not a run.max_steps stop
            # rank 0's value decides, so every rank takes the same decision whatever MPI's sums did
            value = float(trainer.comm.broadcast(np.array([best.value_of(record)]))[0])
            self.improved = best.update(value, epoch + 1, self.step)
            record["best"] = {**best.state(), "improved": self.improved}
            self.stopped_early = best.should_stop and self.step < self.total
        self.history.append(record)
        if self.lead:
            append(self.metrics_path, record)
            self.console.epoch(record)
        if self.stopped_early:
            self.stop_early(epoch + 1, f"early stop at epoch {epoch + 1}: {best.metric} has not improved by more "
                                       f"than {best.min_improvement:g} for {best.patience} epochs")
        self.epoch_begin = time.perf_counter()
        self.epoch_steps = 0

    def stop_early(self, epoch: int, why: str) -> None:
        """Early stopping ends the run at ``epoch``: mark the tracker, write the ``early_stop`` record (rank 0) and,
        with ``echo``, print ``why`` and where the best model is."""
        best = self.trainer.best
        best.stopped = True
        record = early_stop_record(best, epoch, self.step)
        if self.lead:
            append(self.metrics_path, record)
        if self.lead and self.echo:
            say(f"{why}; the best, {best.value:.6g} at epoch {best.epoch}, is in best.npz",
                self.console.bar if self.console is not None else None)
        self.history.append(record)

    def save_due(self, end_of_epoch: bool) -> bool:
        """A checkpoint by step count (``run.save_every``) or, by default, at each epoch end."""
        every = self.trainer.job.run.save_every
        return self.step % every == 0 if every else end_of_epoch

    def save(self, best: bool = False) -> checkpoint.TrainingState:
        self.trainer.flags.last_save = time.perf_counter()  # the checkpoint clock starts again
        return saving.save(self.trainer, self.step, best=best)

    def finish(self) -> dict[str, Any]:
        """The final checkpoint and final.npz; the summary every rank returns."""
        from shardmill.model.predictor import Predictor

        trainer, job, best = self.trainer, self.trainer.job, self.trainer.best
        state = self.save(best=self.improved)
        trainer.close()
        if self.lead:
            checkpoint.write_final(job.workdir / "final.npz", state)
        model, data = trainer.model, trainer.data
        predictor = Predictor(model, data.mean, data.inv_std, feature_names=getattr(data, "feature_names", None),
                              job=job.as_dict(), digest=job.digest(), step=self.step,
                              categories=getattr(data, "categories", None), target_mean=data.target_mean,
                              target_std=data.target_std)
        return {"model": model, "predictor": predictor, "input_mean": data.mean, "input_inv_std": data.inv_std,
                "history": self.history, "steps": self.step, "workdir": str(job.workdir),
                "processes": trainer.comm.size, "compile_s": self.compile_s,
                "best": best.state() if best is not None else None, "stopped_early": self.stopped_early}
