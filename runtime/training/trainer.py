"""Data-parallel training: every rank runs the same step on its shard of each global batch.

Read :meth:`Trainer.step` top to bottom: sample → gradient (this rank's parts: gather → forward → loss →
backward, each layer handed to the exchange strategy as it completes; then the strategy finishes the sum over
ranks) → clip → update → publish. The strategy (``shardmill.parallel.exchange``) is the only place the fast
and exact modes differ. Metrics are summed per part and reduced once per epoch.
"""

from __future__ import annotations

import json
import math
import os
import signal
import sys
import threading
import time
from pathlib import Path
from typing import Any

import numpy as np
from shardmill import checkpoint
from shardmill.config import Job
from shardmill.data.dataset import Dataset, load_dataset
from shardmill.data.rows import (
    Sampler,
    gather,
)
from shardmill.errors import JobError, LocalJobError
from shardmill.kernels import losses
from shardmill.kernels import optim as kernels_optim
from shardmill.model.mlp import model_from_job
from shardmill.parallel.comm import Comm, agree
from shardmill.parallel.exchange import resolve_update
from shardmill.parallel.exchange import strategy as exchange_strategy
from shardmill.timing import PHASES, PhaseTimer
from shardmill.training.best import BestTracker
from shardmill.training.health import diagnose, warnings
from shardmill.training.optim import Optimizer
from threadpoolctl import threadpool_limits


class Trainer:
    """Owns the model, data, optimizer, exchange strategy and workspaces of one job on one rank."""

    def __init__(self, job: Job, comm: Comm | None = None, dataset: Dataset | None = None) -> None:
        self.job = job
        self.comm = comm or Comm()
        run = resolve_update(job, self.comm.size)  # run.update = "auto" decided for this many ranks
        Strategy = exchange_strategy(run)
        Strategy.check(run, self.comm.size)  # before any collective, identically on every rank
        error: Exception | None = None
        try:
            self.model = model_from_job(job)
        except MemoryError:
            layers = job.model.layers
            params = sum(a * b + b for a, b in zip(layers, layers[1:], strict=False))
            error = JobError(f"`model.layers` = {layers} ({params:,} parameters, {job.model.dtype}) does not fit in "
                             f"this process's memory")
        agree(self.comm, error)
        self.data = dataset if dataset is not None else load_dataset(job, self.model, self.comm)
        self.sampler = Sampler(self.data.split.train, run.global_batch, run.seed)
        self.grads = np.zeros_like(self.model.params)
        self.ws = self.model.workspace(Strategy.part_rows(run, self.comm.size))
        self.batch_targets = np.zeros((self.ws.rows,) + self.data.targets.shape[1:], dtype=self.data.targets.dtype)
        self.exchange = Strategy.from_run(self.comm, self.model, self.grads, run)
        # State for the parameters this rank updates: all of them, or its slice when the update is sharded.
        self.optimizer = Optimizer(job.optimizer, self.exchange.owned_size, self.model.dtype)
        self.step_count = 0  # global steps completed
        self.learning_rate = job.optimizer.learning_rate  # of the last update (the base rate before any)
        self.total_steps = self.planned_steps()
        # The schedule spans all epochs; run.max_steps only stops early, so a stopped run resumes onto the same curve.
        self.schedule_steps = run.epochs * self.sampler.steps_per_epoch
        self.timer = PhaseTimer()
        self.train_sums = self.exchange.metric_sums(3)  # loss sum, correct, rows since the last epoch record
        self.part_sums = np.zeros(3)
        self.last_part_rows = 0  # rows of the part whose activations the workspace holds (for health)
        self.health: list[dict[str, Any]] = []  # diagnostics records not yet written
        self.signals: _StopSignals | None = None  # set by train(): the SIGTERM/SIGINT noted during training
        self.stop_signal = 0  # agreed after the last step's sum: a signal some rank received (0: none)
        self.checkpoint_due = False  # agreed after the last step's sum: run.save_minutes have passed
        self.last_save = time.perf_counter()
        self.best = (BestTracker(run.best_metric, run.patience, run.min_improvement)
                     if run.best_metric != "off" else None)  # the best model so far (run.best_metric)
        if not self.comm.all_equal(self.model.params):
            raise RuntimeError("initial parameters differ across ranks")

    def planned_steps(self) -> int:
        total = self.job.run.epochs * self.sampler.steps_per_epoch
        return min(total, self.job.run.max_steps) if self.job.run.max_steps else total

    def gather_targets(self, rows: np.ndarray) -> np.ndarray:
        np.take(self.data.targets, rows, axis=0, out=self.batch_targets[:rows.size])
        return self.batch_targets

    def step(self, epoch: int, step_in_epoch: int) -> None:
        """One global step of G samples, identical in effect on every rank."""
        self.timer.start()
        rows = self.sampler.batch(epoch, step_in_epoch)  # sample: the G global indices
        self.gradient(rows)  # shard, gather, forward, loss, backward, exchange: the mean gradient
        self.agree()  # a diverged step stops every rank here, before it touches the parameters
        params, gradient = self.model.params, self.exchange.owned_gradient()  # gradient: of params[owned]
        if self.optimizer.clips:
            self.optimizer.clip(gradient, self.exchange.sum_squares())
        health = self.job.run.health_every and (self.step_count + 1) % self.job.run.health_every == 0
        grad_squares = self.exchange.layer_sum_squares(self.model.slices) if health else None
        before = params.copy() if health else None
        self.learning_rate = self.optimizer.step(params[self.exchange.owned], gradient, self.schedule_steps)
        self.timer.lap("update")
        self.exchange.publish(params)  # every rank holds every parameter again (communication: "exchange")
        self.timer.lap("exchange")
        self.step_count += 1
        if health:
            self.health.append(diagnose(self.model, self.ws, self.last_part_rows, grad_squares, before, self.comm,
                                        self.step_count))
        every = self.job.run.check_every
        if every and self.step_count % every == 0 and not self.comm.all_equal(params):
            raise RuntimeError(f"parameters drifted apart across ranks at step {self.step_count}")

    def agree(self) -> None:
        """What every rank must decide alike after the sum: one MAX allreduce of three flags (P > 1).

        A non-finite loss or an unsummable gradient on any rank raises :class:`Diverged` on every rank, before the
        update. A SIGTERM/SIGINT some rank received (``stop_signal``) and a timed checkpoint due by rank 0's clock
        (``checkpoint_due``) are kept for the train loop to act on once the step is complete.
        """
        reason = self.problem or self.exchange.problem
        minutes = self.job.run.save_minutes
        due = bool(minutes) and self.comm.rank == 0 and time.perf_counter() - self.last_save >= 60.0 * minutes
        flags = np.array([reason is not None, self.signals.received if self.signals else 0, due], dtype=np.int64)
        if self.comm.size > 1:
            self.comm.allreduce_max(flags)
        if flags[0]:
            raise Diverged(self.step_count + 1, reason or "on another rank", self.job.workdir)
        self.stop_signal, self.checkpoint_due = int(flags[1]), bool(flags[2])

    def gradient(self, rows: np.ndarray) -> None:
        """The mean gradient of the global batch ``rows`` over every rank: ``exchange.owned_gradient()`` after it."""
        self.problem = self.exchange.problem = None
        for part, part_grads in self.exchange.parts(rows):
            self.part_gradient(part, part_grads)
            self.exchange.add(part_grads)
            self.timer.lap("backward")
        self.exchange.finish()
        self.timer.lap("exchange")

    def part_gradient(self, rows: np.ndarray, grads: np.ndarray) -> None:
        """Gradient of one part's rows into ``grads`` (scaled by 1/G); the loss and counts join ``train_sums``.

        Backward tells the exchange as each layer's gradient is complete, so it can start sending.
        """
        n, G = rows.size, self.job.run.global_batch
        gather(self.data.X, rows, self.data.mean, self.data.inv_std, self.ws.inputs)
        targets = self.gather_targets(rows)
        self.timer.lap("data")
        loss_sum = self.ws.forward_loss(n, targets, 1.0 / G)
        if not math.isfinite(loss_sum) and self.problem is None:
            self.problem = f"the loss of {n} rows is {loss_sum!r}"
        self.part_sums[:] = (loss_sum, self.quality_sum(n, targets), n)
        self.train_sums.add(self.part_sums)
        self.last_part_rows = n
        self.timer.lap("forward")
        for layer, _ in self.ws.backward(n, grads):
            self.exchange.layer_done(layer)

    def quality_sum(self, n: int, targets: np.ndarray) -> float:
        """The second metric sum of the batch in the workspace: correct predictions, or Σ (o − t)² (regression)."""
        if self.model.loss == "squared_error":
            return losses.squared_error_sum(self.ws.O[:n], targets[:n])
        return self.count_correct(n, targets)

    def count_correct(self, n: int, targets: np.ndarray) -> int:
        loss = self.model.loss_code
        if loss == losses.SOFTMAX_CROSS_ENTROPY:
            return losses.count_correct(self.ws.O[:n], targets[:n])  # O holds the softmax of this batch
        if loss == losses.BINARY_CROSS_ENTROPY:
            return losses.count_correct_binary(self.ws.O[:n], targets[:n])
        return 0

    def take_train_sums(self) -> np.ndarray:
        """The training (loss sum, correct, rows) since the last call, summed over ranks; resets them.

        Summed as the exchange strategy sums metrics: in exact mode exactly, per fixed chunk, so the logged
        losses do not depend on P.
        """
        return self.train_sums.reduce()

    def evaluate(self, rows: np.ndarray) -> dict[str, float]:
        """Loss and accuracy (or RMSE) over ``rows``, reduced over ranks.

        Each rank evaluates the part the exchange strategy gives it (exact mode: whole chunks of
        ``exact_chunk`` rows whatever P is, summed exactly, so the result has the same bits for every P).
        """
        width = self.ws.rows
        part = self.exchange.evaluation_rows(rows)
        sums = self.exchange.metric_sums(3)  # loss sum, correct or squared-error sum, rows
        chunk_sums = np.zeros(3)
        for start in range(0, part.size, width):
            chunk = part[start:start + width]
            n = chunk.size
            gather(self.data.X, chunk, self.data.mean, self.data.inv_std, self.ws.inputs)
            targets = self.gather_targets(chunk)
            chunk_sums[0] = self.ws.forward_loss(n, targets, 0.0)
            chunk_sums[1] = self.quality_sum(n, targets)
            chunk_sums[2] = n
            sums.add(chunk_sums)
        return self.summarise(sums.reduce())

    def summarise(self, sums: np.ndarray) -> dict[str, float]:
        n = max(sums[2], 1.0)
        out = {"loss": float(sums[0] / n)}
        k = self.model.sizes[-1]
        if self.model.loss == "squared_error":
            out["rmse"] = float(math.sqrt(sums[1] / (n * k)))
        elif self.model.loss == "binary_cross_entropy":
            out["accuracy"] = float(sums[1] / (n * k))
        else:
            out["accuracy"] = float(sums[1] / n)
        return out

    def reduce_phases(self) -> tuple[dict[str, float], dict[str, float]]:
        """Per-phase seconds since the last call: (max over ranks, mean over ranks)."""
        high, total = self.timer.seconds.copy(), self.timer.seconds.copy()
        self.comm.allreduce_max(high)
        self.comm.allreduce_sum(total)
        self.timer.reset()
        mean = total / self.comm.size
        return dict(zip(PHASES, map(float, high), strict=True)), dict(zip(PHASES, map(float, mean), strict=True))

    def training_state(self, step: int) -> checkpoint.TrainingState:
        """The plain state a checkpoint holds: views of the parameters, the optimizer state at full size.

        Collective (every rank calls it): a sharded update's state slices are gathered.
        """
        optimizer = {name: self.exchange.full(array) for name, array in self.optimizer.state.items()}
        return checkpoint.TrainingState(
            params=self.model.named(self.model.params), input_mean=self.data.mean, input_inv_std=self.data.inv_std,
            optimizer=optimizer, optimizer_updates=self.optimizer.updates, step=step,
            steps_per_epoch=self.sampler.steps_per_epoch, processes=self.comm.size, job=self.job,
            layers=self.model.sizes, dtype=self.model.dtype.name,
            feature_names=getattr(self.data, "feature_names", None),
            best=self.best.state() if self.best is not None else None)

    def save(self, step: int, best: bool = False) -> checkpoint.TrainingState:
        """Checkpoint ``step``: every rank calls it, rank 0 writes (parameters are identical on every rank).

        ``best``: the model of this step is the best so far (``run.best_metric``): the index marks the checkpoint,
        which is then kept beside the newest, and ``best.npz`` is rewritten. Returns the state it saved.
        """
        state = self.training_state(step)
        self.last_save = time.perf_counter()
        if self.comm.rank == 0:
            root = self.job.workdir / "checkpoints"
            try:
                checkpoint.save(state, root, self.job.run.keep_checkpoints, best=best)
                if best:
                    checkpoint.write_final(self.job.workdir / "best.npz", state)
            except OSError as err:  # a full disk, a read-only file system: the previous checkpoint is intact
                try:
                    last = checkpoint.latest_name(root)
                except checkpoint.CheckpointError:
                    last = None
                kept = f"the last complete checkpoint is {last}" if last else "no checkpoint was completed"
                raise LocalJobError(f"the checkpoint of step {step} cannot be written under {str(root)!r}: "
                                    f"{err.strerror or err}; {kept}") from None
        return state

    def resume(self) -> int:
        """Restore params, optimizer state and position from the newest checkpoint that verifies; returns the step.

        Rank 0 reads and verifies; every rank receives the same arrays by broadcast (node-local disks work).
        Any refusal is raised identically on all ranks.
        """
        comm, model = self.comm, self.model
        error: Exception | None = None
        state: dict[str, Any] | None = None
        if comm.rank == 0:
            try:
                state, params, opt, skipped = checkpoint.load_newest_verified(self.job.workdir)
                for reason in skipped:
                    print(f"shardmill: warning: skipping a damaged checkpoint, {reason}", file=sys.stderr,
                          flush=True)
                shapes = {name: view.shape for name, view in model.named(model.params).items()}
                optimizer_shapes = {name: (model.n_params,) for name in self.optimizer.state}
                checkpoint.check_compatible(self.job, shapes, optimizer_shapes, state, params, opt)
            except checkpoint.CheckpointError as err:
                error = err
        agree(comm, error)
        state = comm.broadcast_object(state)
        if comm.rank == 0:
            for name, view in model.named(model.params).items():
                view[...] = params[name]
        comm.broadcast(model.params)
        for name, array in self.optimizer.state.items():  # saved at full size; this rank keeps what it updates
            full = opt[name] if comm.rank == 0 else np.zeros(model.n_params, dtype=array.dtype)
            array[...] = comm.broadcast(np.ascontiguousarray(full, dtype=array.dtype))[self.exchange.owned]
        self.optimizer.updates = int(state["optimizer_updates"])
        self.step_count = int(state["step"])
        if self.best is not None:
            run = self.job.run
            self.best = BestTracker(run.best_metric, run.patience, run.min_improvement, state.get("best"))
        given = state.get("overrides") or []
        if comm.rank == 0 and given != list(self.job.overrides):
            now = " --set ".join(self.job.overrides)
            print(f"shardmill: note: the checkpoint was written by a run with "
                  f"{'--set ' + ' --set '.join(given) if given else 'no --set'}; this resume has "
                  f"{'--set ' + now if now else 'none'}", file=sys.stderr, flush=True)
        return self.step_count


def warm_up_kernels(trainer: Trainer) -> float:
    """Compile (or load from Numba's disk cache) every kernel the step uses; rank 0 first, then the others.

    Ranks starting together would otherwise all compile and write the cache at once. Works on scratch
    copies, so the model is untouched. Returns the seconds it took on this rank.
    """
    comm = trainer.comm
    begin = time.perf_counter()

    def run() -> None:
        rows = trainer.data.split.train[: min(2, trainer.data.split.train.size)]
        grads = np.zeros_like(trainer.grads)
        gather(trainer.data.X, rows, trainer.data.mean, trainer.data.inv_std, trainer.ws.inputs)
        targets = trainer.gather_targets(rows)
        trainer.ws.forward_loss(rows.size, targets, 1.0)
        trainer.quality_sum(rows.size, targets)
        for _ in trainer.ws.backward(rows.size, grads):
            pass
        scratch = Optimizer(trainer.job.optimizer, grads.size, grads.dtype)
        kernels_optim.sum_squares(grads)
        kernels_optim.scale(grads, 1.0)
        scratch.step(trainer.model.params.copy(), grads, 1)
        trainer.exchange.warm_up()

    if comm.rank == 0:
        run()
    comm.barrier()
    if comm.rank != 0:
        run()
    comm.barrier()  # nobody's first timed step waits for another rank's compilation
    return time.perf_counter() - begin


class Diverged(JobError):
    """The run diverged: a non-finite loss, or a gradient that exact mode cannot sum. Raised on every rank before
    the step's update, so the last checkpoint is still good; a user-level error (exit 2, one line)."""

    def __init__(self, step: int, reason: str, workdir: Path) -> None:
        try:
            last = checkpoint.latest_name(workdir / "checkpoints") or ""
        except checkpoint.CheckpointError:
            last = ""
        saved = f"; the last checkpoint is {last} in {str(workdir / 'checkpoints')!r}" if last else ""
        super().__init__(f"step {step}: the run diverged ({reason}); try a lower `optimizer.learning_rate` or "
                         f"`optimizer.clip_global_norm`{saved}")
        self.step = step


class TrainingStopped(Exception):
    """SIGTERM or SIGINT arrived during training: every rank finished its step and a checkpoint was written.

    ``exit_code`` is 128 + the signal number (143 for SIGTERM, 130 for SIGINT), as a shell reports it.
    """

    def __init__(self, signum: int, step: int, workdir: Path, overrides: tuple[str, ...] = ()) -> None:
        import shlex

        name = signal.Signals(signum).name
        sets = "".join(f" --set {shlex.quote(text)}" for text in overrides)
        super().__init__(f"stopped by {name} after step {step}; checkpoint written under {workdir / 'checkpoints'}; "
                         f"continue with `shardmill train JOB --resume{sets}`")
        self.exit_code = 128 + signum
        self.step = step


class _StopSignals:
    """Remember SIGTERM (what a batch system sends before its time limit) and SIGINT (Ctrl-C) during training.

    The handlers only note the signal; :meth:`Trainer.agree` shares it after every step's sum, and all ranks
    stop together after the same step, so a checkpoint can be written collectively.
    """

    SIGNALS = (signal.SIGTERM, signal.SIGINT)

    def __init__(self) -> None:
        self.received = 0
        self._previous: dict[int, Any] = {}

    def __enter__(self) -> _StopSignals:
        if threading.current_thread() is threading.main_thread():  # handlers can only be set there
            for signum in self.SIGNALS:
                self._previous[signum] = signal.signal(signum, self._note)
        return self

    def __exit__(self, *exc_info: object) -> None:
        for signum, handler in self._previous.items():
            signal.signal(signum, handler)

    def _note(self, signum: int, frame: Any) -> None:
        self.received = self.received or signum


HEARTBEAT_S = 30.0
"""Seconds between progress lines when no progress bar is shown (a batch log, a pipe) and ``echo`` is on."""


def epoch_line(record: dict[str, Any]) -> str:
    """One console line for an epoch record of metrics.jsonl: its own field paths (``train.loss``,
    ``validation.accuracy``…), fewer digits, and a ``*`` after the watched metric when it is the best so far."""
    best = record.get("best") or {}
    parts = [f"epoch={record['epoch']}", f"step={record['step']}"]
    for section in ("train", "validation"):
        for key in ("loss", "accuracy", "rmse"):
            if key in (record.get(section) or {}):
                mark = "*" if best.get("improved") and best.get("metric") == f"{section}.{key}" else ""
                parts.append(f"{section}.{key}={record[section][key]:.4f}{mark}")
    parts.append(f"samples_per_s={record['samples_per_s']:.0f}")
    return " ".join(parts)


def train(job: Job, comm: Comm | None = None, resume: bool = False, progress: bool = True,
          echo: bool = False, fresh: bool = False) -> dict[str, Any]:
    """Train ``job`` on every rank of ``comm`` (MPI.COMM_WORLD by default).

    Rank 0 writes ``workdir/metrics.jsonl`` (one JSON object per epoch), checkpoints and
    ``workdir/final.npz`` (arrays W0, b0, W1, b1, …). Returns a summary dict on every rank, including
    the final model under ``"model"``. ``echo``: rank 0 prints each epoch's line as the epoch ends (flushed, so a
    batch log shows it at once) and, without a progress bar, a heartbeat line every :data:`HEARTBEAT_S` seconds.
    """
    comm = comm or Comm()
    with _WorkdirLock(job.workdir, comm):
        if resume:
            _check_resumable(job.workdir, comm)  # before the data is read (a table may take a while to convert)
        else:
            _claim_workdir(job.workdir, fresh, comm)
        with threadpool_limits(limits=job.run.threads, user_api="blas"), _StopSignals() as stop:
            trainer = Trainer(job, comm)
            trainer.signals = stop
            return _train_loop(trainer, resume, progress, echo)


class _WorkdirLock:
    """One job per workdir: rank 0 holds an exclusive lock on ``workdir/.shardmill.lock`` while the job runs.

    An advisory ``flock``: the kernel drops it when the process ends however it ends, so a killed job never
    blocks its own resume. A second job (another training, or a resume started while the first still runs) is
    refused on every rank before anything else happens.
    """

    def __init__(self, workdir: Path, comm: Comm) -> None:
        self.workdir, self.comm = workdir, comm
        self._file: Any = None
        self._created = False  # rank 0 made the folder: a job that fails before it trains leaves none behind

    def __enter__(self) -> _WorkdirLock:
        import fcntl

        error: Exception | None = None
        if self.comm.rank == 0:
            path = self.workdir / ".shardmill.lock"
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
            except BlockingIOError:
                self._file.seek(0)
                holder = self._file.read().strip() or "?"
                self._file.close()
                self._file = None
                error = JobError(f"`run.workdir` {str(self.workdir)!r} is in use by another shardmill job "
                                 f"(process {holder}); wait for it to end or choose another `run.workdir`")
            except OSError as err:
                error = JobError(f"`run.workdir` {str(self.workdir)!r} cannot be used: {err.strerror or err}")
        agree(self.comm, error)
        return self

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


def _check_resumable(workdir: Path, comm: Comm) -> None:
    """Refuse --resume (every rank alike) when the workdir has no checkpoint index to resume from."""
    error: Exception | None = None
    if comm.rank == 0:
        root = workdir / "checkpoints"
        try:
            if not (root.is_dir() and checkpoint.latest_name(root)):
                error = JobError(f"nothing to resume: no checkpoint under {str(root)!r}; start the run without "
                                 f"--resume")
        except checkpoint.CheckpointError as err:
            error = err
    agree(comm, error)


def _claim_workdir(workdir: Path, fresh: bool, comm: Comm) -> None:
    """A new run needs a workdir without an earlier run's files: refuse one (every rank alike), or clear it."""
    error: Exception | None = None
    if comm.rank == 0:
        found = checkpoint.holds_a_run(workdir)
        if found and fresh:
            checkpoint.clear_run(workdir)
        elif found:
            error = JobError(f"`run.workdir` {str(workdir)!r} holds an earlier run ({found}); continue it with "
                             f"--resume (resume=True in Python), start over with --fresh (fresh=True), or choose "
                             f"another `run.workdir`")
    agree(comm, error)


def _train_loop(trainer: Trainer, resume: bool, progress: bool, echo: bool = False) -> dict[str, Any]:
    job, comm, model = trainer.job, trainer.comm, trainer.model
    workdir = job.workdir
    lead = comm.rank == 0
    if echo and lead and not _kernels_cached():
        print(f"compiling kernels for {trainer.model.dtype.name} (first run only; `shardmill compile JOB` does it "
              f"ahead)…", flush=True)
    compile_s = warm_up_kernels(trainer)
    if echo and lead and compile_s > 1.0:
        print(f"kernels ready in {compile_s:.1f} s (compiled once, then loaded from Numba's cache)", flush=True)
    start_step = trainer.resume() if resume else 0
    if start_step > trainer.total_steps:  # the same on every rank: the checkpoint's step was broadcast
        run = job.run
        limit = (f"run.max_steps = {run.max_steps}" if run.max_steps and run.max_steps < run.epochs *
                 trainer.sampler.steps_per_epoch else f"run.epochs = {run.epochs} of "
                 f"{trainer.sampler.steps_per_epoch} steps")
        raise JobError(f"the checkpoint is at step {start_step}, past this job's last step {trainer.total_steps} "
                       f"({limit}); raise it to continue (e.g. --set run.epochs=…)")
    metrics_path = workdir / "metrics.jsonl"
    if lead:
        workdir.mkdir(parents=True, exist_ok=True)
        _append(metrics_path, _start_record(trainer, start_step))
    steps_per_epoch = trainer.sampler.steps_per_epoch
    total = trainer.total_steps
    best = trainer.best
    history: list[dict[str, Any]] = []
    if best is not None and best.should_stop and best.stopped:  # a resume of a run that had stopped early
        total = start_step
        if echo and lead:
            print(f"already stopped early at step {start_step}: {best.metric} had not improved for "
                  f"{best.stale_epochs} epochs (run.patience = {best.patience}); raise run.patience to go on",
                  flush=True)
    elif best is not None and best.should_stop:  # a resume with a smaller run.patience: it is reached already
        total = start_step
        history.append(_stop_early(best, start_step // steps_per_epoch, start_step, metrics_path, lead and echo,
                                   f"early stop at once: {best.metric} has not improved for {best.stale_epochs} "
                                   f"epochs, which reaches run.patience = {best.patience}", None, lead))
    bar = _progress_bar(total, start_step, lead and progress)
    epoch_begin = time.perf_counter()
    epoch_steps = 0
    step = start_step
    beat = _Heartbeat(total, start_step, job.run.global_batch) if lead and echo and bar is None else None
    improved = False
    stopped_early = best is not None and best.stopped  # already, on a resume (see above)
    while step < total:
        epoch, in_epoch = divmod(step, steps_per_epoch)
        trainer.step(epoch, in_epoch)
        step += 1
        epoch_steps += 1
        if bar is not None:
            bar.update(1)
        if beat is not None:
            beat.tick(step)
        end_of_epoch = step % steps_per_epoch == 0 or step == total
        if trainer.health:
            _write_health(trainer, metrics_path, lead)
        improved = False
        if end_of_epoch:
            seconds = time.perf_counter() - epoch_begin
            record = _epoch_record(trainer, epoch, step, epoch_steps, seconds, compile_s)
            if best is not None and step % steps_per_epoch == 0:  # whole epochs only, not a run.max_steps stop
                # rank 0's value decides, so every rank takes the same decision whatever MPI's sums did
                value = float(comm.broadcast(np.array([best.value_of(record)]))[0])
                improved = best.update(value, epoch + 1, step)
                record["best"] = {**best.state(), "improved": improved}
                stopped_early = best.should_stop and step < total
            history.append(record)
            if lead:
                _append(metrics_path, record)
                if bar is not None:
                    bar.set_postfix(loss=f"{record['train']['loss']:.4g}",
                                    samples_s=f"{record['samples_per_s']:.0f}")
                if echo:
                    _say(epoch_line(record), bar)
            if stopped_early:
                history.append(_stop_early(best, epoch + 1, step, metrics_path, lead and echo,
                                           f"early stop at epoch {epoch + 1}: {best.metric} has not improved by more "
                                           f"than {best.min_improvement:g} for {best.patience} epochs", bar, lead))
            epoch_begin = time.perf_counter()
            epoch_steps = 0
        if step >= total or stopped_early:
            break  # the final checkpoint follows the loop
        signum, every = trainer.stop_signal, job.run.save_every
        if improved or signum or trainer.checkpoint_due or (step % every == 0 if every else end_of_epoch):
            trainer.save(step, best=improved)  # by step count, at each epoch end by default, by the clock, for a
            # new best model, or before stopping
        if signum:  # every rank finished this step and the checkpoint is written: leave together
            if bar is not None:
                bar.close()
            trainer.exchange.close()
            raise TrainingStopped(signum, step, workdir, job.overrides)
    if bar is not None:
        bar.close()
    state = trainer.save(step, best=improved)
    trainer.exchange.close()
    if lead:
        checkpoint.write_final(workdir / "final.npz", state)
    from shardmill.model.predictor import Predictor

    data = trainer.data
    predictor = Predictor(model, data.mean, data.inv_std, feature_names=getattr(data, "feature_names", None),
                          job=job.as_dict(), digest=job.digest(), step=step)
    return {"model": model, "predictor": predictor, "input_mean": data.mean, "input_inv_std": data.inv_std,
            "history": history, "steps": step, "workdir": str(workdir), "processes": comm.size,
            "compile_s": compile_s, "best": best.state() if best is not None else None,
            "stopped_early": stopped_early}


def _stop_early(best: BestTracker, epoch: int, step: int, metrics_path: Path, say: bool, why: str, bar: Any,
                lead: bool) -> dict[str, Any]:
    """Early stopping ends the run at ``epoch`` (global ``step``): mark the tracker, write the ``early_stop`` record
    (rank 0) and, when ``say``, print ``why`` and where the best model is. Returns the record."""
    best.stopped = True
    record = {"kind": "early_stop", "epoch": epoch, "step": step, "metric": best.metric, "best_value": best.value,
              "best_epoch": best.epoch, "best_step": best.step, "patience": best.patience}
    if lead:
        _append(metrics_path, record)
    if say:
        _say(f"{why}; the best, {best.value:.6g} at epoch {best.epoch}, is in best.npz", bar)
    return record


def _append(path: Path, record: dict[str, Any]) -> None:
    """Append one record to metrics.jsonl (rank 0), flushed as one line."""
    with open(path, "a") as out:
        out.write(json.dumps(record) + "\n")


def _start_record(trainer: Trainer, start_step: int) -> dict[str, Any]:
    """The first record of each run segment (a fresh start, or a resume): what ran, where, with which job."""
    from shardmill.version import __version__

    job = trainer.job
    return {"kind": "start", "time": checkpoint.utc_now(), "version": __version__, "processes": trainer.comm.size,
            "resumed_from_step": start_step, "job": job.as_dict(), "job_digest": job.digest(),
            "overrides": list(job.overrides)}


def _kernels_cached() -> bool:
    """True when Numba's cache already holds compiled shardmill kernels (its index files, *.nbi)."""
    from shardmill.machine import numba_cache_dir

    folder = Path(numba_cache_dir())
    return folder.is_dir() and any(folder.rglob("*.nbi"))


def _say(line: str, bar: Any) -> None:
    """Print a line now (through the progress bar when one is drawn, so the bar is not torn)."""
    if bar is not None:
        bar.write(line)
    else:
        print(line, flush=True)


class _Heartbeat:
    """A progress line every HEARTBEAT_S seconds: step, samples/s since the last line, and the time left."""

    def __init__(self, total: int, done: int, global_batch: int) -> None:
        self.total, self.global_batch = total, global_batch
        self.begin = self.last = time.perf_counter()
        self.first = self.last_step = done

    def tick(self, step: int) -> None:
        now = time.perf_counter()
        if now - self.last < HEARTBEAT_S or step >= self.total:
            return
        rate = (step - self.last_step) * self.global_batch / (now - self.last)
        left = (self.total - step) * (now - self.begin) / max(step - self.first, 1)
        print(f"step {step:>6}/{self.total}  {rate:,.0f} samples/s  about {left:,.0f} s left", flush=True)
        self.last, self.last_step = now, step


def _write_health(trainer: Trainer, path: Path, lead: bool) -> None:
    """Append pending health records to metrics.jsonl and print their warnings (rank 0)."""
    if lead:
        for record in trainer.health:
            _append(path, record)
            for text in warnings(record):
                print(f"shardmill: warning: {text}", file=sys.stderr, flush=True)
    trainer.health.clear()


def _progress_bar(total: int, done: int, show: bool):
    if not show:
        return None
    from tqdm import tqdm

    return tqdm(total=total, initial=done, unit="step", dynamic_ncols=True, disable=None)


def _epoch_record(trainer: Trainer, epoch: int, step: int, steps: int, seconds: float,
                  compile_s: float) -> dict[str, Any]:
    job, comm = trainer.job, trainer.comm
    train_metrics = trainer.summarise(trainer.take_train_sums())
    phase_max, phase_mean = trainer.reduce_phases()
    seconds_max = np.array([seconds])
    comm.allreduce_max(seconds_max)
    record: dict[str, Any] = {
        "kind": "epoch",
        "epoch": epoch + 1,
        "step": step,
        "processes": comm.size,
        "global_batch": job.run.global_batch,
        "reduction": job.run.reduction,
        "train": train_metrics,
        "learning_rate": trainer.learning_rate,
        "seconds": float(seconds_max[0]),
        "samples_per_s": float(steps * job.run.global_batch / max(seconds_max[0], 1e-12)),
        "phase_seconds_max": phase_max,
        "phase_seconds_mean": phase_mean,
        "compile_s": compile_s,
    }
    if trainer.data.split.validation.size:
        record["validation"] = trainer.evaluate(trainer.data.split.validation)
    return record

