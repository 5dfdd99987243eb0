"""Data-parallel training: every rank runs the same step on its shard of each global batch.

Read :meth:`Trainer.step` top to bottom: sample → gradient (this rank's parts: take rows → forward → loss →
backward, each layer handed to the exchange strategy as it completes; then the strategy finishes the sum over
ranks, and the ranks agree the step may go on) → clip → update (then publish). The strategy
(``shardmill.parallel.exchange``) is the only place the fast and exact modes differ. Metrics are summed per part
and reduced once per epoch. The run loop around the step is ``training/loop.py``.
"""

from __future__ import annotations

import math
from pathlib import Path

import numpy as np
from shardmill import checkpoint
from shardmill.config import Job
from shardmill.data.categories import embedding_shapes, load_categories
from shardmill.data.dataset import Arrays, Dataset, check_arrays, load_dataset
from shardmill.data.rows import Sampler, take_rows
from shardmill.errors import JobError
from shardmill.kernels import losses as loss_kernels
from shardmill.kernels.dispatch import use_threads
from shardmill.model.mlp import model_from_job
from shardmill.parallel.comm import Comm, share_error
from shardmill.parallel.exchange import blas_threads, resolve_update
from shardmill.parallel.exchange import strategy as exchange_strategy
from shardmill.timing import PHASES, PhaseTimer
from shardmill.training import saving
from shardmill.training.best import BestTracker
from shardmill.training.lanes import Lane, Lanes
from shardmill.training.optim import Optimizer


class StepFlags:
    """What the run loop adds to each step's agreement, and what the ranks agreed.

    :meth:`local` gives this rank's (stop signal received, timed checkpoint due) before the step's agreement;
    after it, ``stop_signal`` (a SIGTERM/SIGINT some rank received, 0: none) and ``checkpoint_due`` hold the
    agreed values. This base has neither: a Trainer stepped outside the run loop (bench, scale, verify, tests).
    """

    def __init__(self) -> None:
        self.stop_signal = 0
        self.checkpoint_due = False

    def local(self) -> tuple[int, bool]:
        return 0, False


class Trainer:
    """Owns the model, data, optimizer, exchange strategy and workspaces of one job on one rank."""

    def __init__(self, job: Job, comm: Comm | None = None, dataset: Dataset | None = None,
                 arrays: Arrays | None = None) -> None:
        self.job = job
        self.comm = comm or Comm()
        run = resolve_update(job, self.comm.size)  # run.update = "auto" decided for this many ranks
        Strategy = exchange_strategy(run)
        Strategy.check(run, self.comm.size)  # before any collective, identically on every rank
        use_threads(blas_threads(job, self.comm.size))  # the kernels' threads: BLAS's (exact mode: 1)
        error: Exception | None = None
        if arrays is not None:
            check_arrays(job, arrays, self.comm)
        # the categorical columns' vocabularies size the embedding tables, so they are read before the model
        categories, codes = ((dataset.categories, dataset.codes) if dataset is not None
                             else load_categories(job, self.comm))
        try:
            self.model = model_from_job(job, embedding_shapes(categories))
        except MemoryError:
            layers = job.model.layers
            params = sum(a * b + b for a, b in zip(layers, layers[1:], strict=False))
            error = JobError(f"`model.layers` = {layers} ({params:,} parameters, {job.model.dtype}) does not fit in "
                             f"this process's memory")
        share_error(self.comm, error)
        self.data = (dataset if dataset is not None
                     else load_dataset(job, self.model, self.comm, categories, codes, arrays=arrays))
        self.sampler = Sampler(self.data.split.train, run.global_batch, run.seed)
        self.grads = np.zeros_like(self.model.params)
        self.ws = self.model.workspace(Strategy.part_rows(run, self.comm.size))
        self.timer = PhaseTimer()
        self.batch_targets = np.zeros((self.ws.rows,) + self.data.targets.shape[1:], dtype=self.data.targets.dtype)
        self.batch_weights = np.ones(self.ws.rows)  # the part's row weights (ones stay ones for an unweighted job)
        self.scale = 1.0 / run.global_batch  # 1 / Σ w of the current global batch (1/G unweighted)
        self.exchange = Strategy.from_run(self.comm, self.model, self.grads, run)
        # the part's own buffers (lane 0), and the lanes that compute several parts at once (exact mode, T > 1)
        self.lane = Lane(self.ws, self.batch_targets, self.batch_weights, self.timer)
        self.lanes = Lanes(self, Strategy.lanes(run)) if Strategy.lanes(run) > 1 else None
        # State for the parameters this rank updates: all of them, or its slice when the update is sharded.
        self.optimizer = Optimizer(job.optimizer, self.exchange.owned_size, self.model.dtype)
        self.step_count = 0  # global steps completed
        self.learning_rate = job.optimizer.learning_rate  # of the last update (the base rate before any)
        self.total_steps = self.planned_steps()
        # The schedule spans all epochs; run.max_steps only stops early, so a stopped run resumes onto the same curve.
        self.schedule_steps = run.epochs * self.sampler.steps_per_epoch
        # weighted loss sum, correct (or Σ (o − t)²), rows, Σ w: since the last epoch record
        self.train_sums = self.exchange.metric_sums(4)
        self.problem: str | None = None  # why this step's loss cannot be trusted (a diverged run), or None
        self.last_part_rows = 0  # rows of the last part, whose activations last_workspace holds (for health)
        self.last_workspace = self.ws
        self.flags = StepFlags()  # the run loop hands in its own: stop signals and the checkpoint clock
        self.best = (BestTracker(run.best_metric, run.patience, run.min_improvement)
                     if run.best_metric != "off" else None)  # the best model so far (run.best_metric)
        if not self.comm.all_equal(self.model.params):
            raise RuntimeError("initial parameters differ across ranks")

    def planned_steps(self) -> int:
        total = self.job.run.epochs * self.sampler.steps_per_epoch
        return min(total, self.job.run.max_steps) if self.job.run.max_steps else total

    def take_inputs(self, rows: np.ndarray, ws=None) -> None:
        """The standardised numeric columns of ``rows`` and their category codes into the workspace (``self.ws``)."""
        ws = ws or self.ws
        take_rows(self.data.X, rows, self.data.mean, self.data.inv_std, ws.numeric)
        if self.data.codes is not None:
            np.take(self.data.codes, rows, axis=0, out=ws.codes[:rows.size])

    def take_targets(self, rows: np.ndarray, out: np.ndarray | None = None) -> np.ndarray:
        """The targets of ``rows`` in ``out`` (default: the batch target buffer), rows first; returns ``out``."""
        out = self.batch_targets if out is None else out
        np.take(self.data.targets, rows, axis=0, out=out[:rows.size])
        return out

    def take_weights(self, rows: np.ndarray, out: np.ndarray | None = None) -> np.ndarray:
        """The weights of ``rows`` in ``out`` (default: the batch weight buffer), (≥ rows.size,) float64 (ones
        when unweighted)."""
        out = self.batch_weights if out is None else out
        if self.data.weights is not None:
            np.take(self.data.weights, rows, out=out[:rows.size])
        return out

    def batch_scale(self, rows: np.ndarray) -> float:
        """1 / Σ w over the global batch ``rows`` (1/G unweighted): every rank computes it from all G rows, Σ
        correctly rounded (math.fsum), so it has the same bits on every rank and for every P; 0 for a batch whose
        rows all weigh 0 (its gradient is zero, not NaN)."""
        if self.data.weights is None:
            return 1.0 / rows.size
        total = math.fsum(self.data.weights[rows])
        return 1.0 / total if total > 0 else 0.0

    def step(self, epoch: int, step_in_epoch: int) -> None:
        """One global step of G samples, identical in effect on every rank."""
        self.timer.start()
        rows = self.sampler.batch(epoch, step_in_epoch)  # sample: the G global indices
        gradient = self.gradient(rows)  # shard, take rows, forward, loss, backward, exchange: of params[owned]
        self.clip(gradient)
        self.update(gradient)

    def gradient(self, rows: np.ndarray) -> np.ndarray:
        """The mean gradient of the global batch ``rows`` over every rank, of ``params[exchange.owned]``.

        Returns the exchange's owned gradient, (owned_size,) in the model's dtype (a view: valid until the next
        call). Ends with the step's agreement (:meth:`agree`), so a diverged sum stops every rank here.
        """
        self.problem = None  # the exchange resets its own at the start of parts()
        self.data.check_inputs_file()  # once a step: a memory-mapped file cut short would end it with SIGBUS
        self.scale = self.batch_scale(rows)
        parts = self.exchange.parts(rows)
        if self.lanes is not None:  # exact mode, T > 1: whole parts at once, joined in order
            self.lanes.run(self, parts)
            self.timer.lap("backward")  # the lanes' data, forward and backward, as one phase
        for part, part_grads in parts:  # (nothing left after the lanes)
            self.part_gradient(part, part_grads)
            self.join_part(part, part_grads, self.lane)
            self.timer.lap("backward")
        self.exchange.finish()
        self.timer.hold("exchange")  # the exchange phase goes on with the publish after the update
        self.agree()
        return self.exchange.owned_gradient()

    def close(self) -> None:
        """Release what the step started (the exchange's communication thread, the lanes' pool); idempotent."""
        self.exchange.close()
        if self.lanes is not None:
            self.lanes.close()

    def agree(self) -> None:
        """What every rank must decide alike after the sum: one MAX allreduce of three flags (P > 1).

        A non-finite loss or an unsummable gradient on any rank raises :class:`Diverged` on every rank, before the
        update. The run loop's flags (``self.flags``: a SIGTERM/SIGINT some rank received, a timed checkpoint due
        by rank 0's clock) ride along; the loop acts on their agreed values once the step is complete.
        """
        reason = self.problem or self.exchange.problem
        received, due = self.flags.local()
        flags = np.array([reason is not None, received, due], dtype=np.int64)
        if self.comm.size > 1:
            self.comm.allreduce_max(flags)
        if flags[0]:
            step = self.step_count + 1
            raise Diverged(diverged_message(step, reason or "on another rank", self.job.workdir), step)
        self.flags.stop_signal, self.flags.checkpoint_due = int(flags[1]), bool(flags[2])

    def clip(self, gradient: np.ndarray) -> None:
        """Scale ``gradient`` (of params[owned]) in place to ``optimizer.clip_global_norm`` if its norm is above."""
        if self.optimizer.clips:
            self.optimizer.clip(gradient, self.exchange.sum_squares())

    def update(self, gradient: np.ndarray) -> None:
        """The optimizer's update of ``params[owned]`` with ``gradient``; then every rank holds every parameter."""
        params = self.model.params
        self.learning_rate = self.optimizer.step(params[self.exchange.owned], gradient, self.schedule_steps)
        self.timer.lap("update")
        self.exchange.publish(params)  # communication: the end of the step's "exchange" phase
        self.timer.lap("exchange")
        self.step_count += 1

    def part_gradient(self, rows: np.ndarray, grads: np.ndarray, lane: Lane | None = None) -> None:
        """Gradient of one part's rows into ``grads`` (scaled by 1/Σw of the global batch: 1/G unweighted), with
        ``lane``'s buffers (default: the trainer's own); the loss and counts into ``lane.sums`` (:meth:`join_part`
        adds them to ``train_sums``). Safe to run in several threads at once on distinct lanes.

        Backward tells the exchange as each layer's gradient is complete, so it can start sending.
        """
        lane = lane or self.lane
        n, ws = rows.size, lane.ws
        self.take_inputs(rows, ws)
        targets, weights = self.take_targets(rows, lane.targets), self.take_weights(rows, lane.weights)
        lane.timer.lap("data")
        loss_sum = ws.forward_loss(n, targets, weights, self.scale, step=self.step_count, rows=rows)
        lane.problem = None if math.isfinite(loss_sum) else f"the loss of {n} rows is {loss_sum!r}"
        lane.sums[:] = (loss_sum, self.quality_sum(n, targets, ws), n, self.weight_sum(n, weights))
        lane.timer.lap("forward")
        for layer, _ in ws.backward(n, grads):
            self.exchange.layer_done(layer)

    def join_part(self, rows: np.ndarray, grads: np.ndarray, lane: Lane) -> None:
        """A computed part joins the step (in part order): its gradient the exchange's sum, its metric sums
        ``train_sums``, its problem (the first one) the step's."""
        self.exchange.add(grads)
        self.train_sums.add(lane.sums)
        self.problem = self.problem or lane.problem
        self.last_part_rows, self.last_workspace = rows.size, lane.ws

    def quality_sum(self, n: int, targets: np.ndarray, ws=None) -> float:
        """The second metric sum of the batch in the workspace (correct predictions, or Σ (o − t)²): the loss's entry
        says which (``model/losses.py``). Standardised targets (``data.standardize_targets``): Σ (o − t)² in the
        targets' own units, so RMSE is logged in them."""
        if self.data.target_std is not None:
            return loss_kernels.squared_error_sum_scaled((ws or self.ws).O[:n], targets[:n], self.data.target_std)
        return self.model.loss_entry.quality_sum((ws or self.ws).O[:n], targets[:n])

    def weight_sum(self, n: int, weights: np.ndarray | None = None) -> float:
        """Σ w of the n rows in ``weights`` (default: the batch weight buffer; n itself, exactly, when unweighted)."""
        return float(n) if self.data.weights is None else math.fsum((self.batch_weights if weights is None
                                                                     else weights)[:n])

    def take_train_sums(self) -> np.ndarray:
        """The training (weighted loss sum, correct, rows, Σ w) since the last call, summed over ranks; resets them.

        Summed as the exchange strategy sums metrics: in exact mode exactly, per fixed chunk, so the logged
        losses do not depend on P.
        """
        return self.train_sums.reduce()

    def evaluate(self, rows: np.ndarray) -> dict[str, float]:
        """Loss and accuracy (or RMSE) over ``rows``, reduced over ranks.

        Each rank evaluates the part the exchange strategy gives it (exact mode: whole chunks of
        ``exact_chunk`` rows whatever P is, summed exactly, so the result has the same bits for every P).
        """
        self.data.check_inputs_file()
        width = self.ws.rows
        part = self.exchange.evaluation_rows(rows)
        sums = self.exchange.metric_sums(4)  # weighted loss sum, correct or squared-error sum, rows, Σ w
        chunk_sums = np.zeros(4)
        for start in range(0, part.size, width):
            chunk = part[start:start + width]
            n = chunk.size
            self.take_inputs(chunk)
            targets, weights = self.take_targets(chunk), self.take_weights(chunk)
            chunk_sums[0] = self.ws.forward_loss(n, targets, weights, 0.0)
            chunk_sums[1] = self.quality_sum(n, targets)
            chunk_sums[2] = n
            chunk_sums[3] = self.weight_sum(n)
            sums.add(chunk_sums)
        return self.summarise(sums.reduce())

    def summarise(self, sums: np.ndarray) -> dict[str, float]:
        """(weighted loss sum, quality sum, rows, Σ w) as the logged metrics: the weighted mean loss and accuracy or
        RMSE over the rows, by the loss's entry."""
        return self.model.loss_entry.summary(sums, self.model.sizes[-1])

    def reduce_phases(self) -> tuple[dict[str, float], dict[str, float]]:
        """Per-phase seconds since the last call: (max over ranks, mean over ranks)."""
        high, total = self.timer.seconds.copy(), self.timer.seconds.copy()
        self.comm.allreduce_max(high)
        self.comm.allreduce_sum(total)
        self.timer.reset()
        mean = total / self.comm.size
        return dict(zip(PHASES, map(float, high), strict=True)), dict(zip(PHASES, map(float, mean), strict=True))

    def training_state(self, step: int) -> checkpoint.TrainingState:
        """The plain state a checkpoint holds (collective); see :func:`shardmill.training.saving.training_state`."""
        return saving.training_state(self, step)

    def resume(self) -> int:
        """Restore from the newest checkpoint that verifies; returns its step (collective); see ``saving.resume``."""
        return saving.resume(self)


class Diverged(JobError):
    """The run diverged: a non-finite loss, or a gradient that exact mode cannot sum. Raised on every rank before
    the step's update, so the last checkpoint is still good; a user-level error (exit 2, one line)."""

    def __init__(self, message: str, step: int) -> None:
        super().__init__(message)
        self.step = step


def diverged_message(step: int, reason: str, workdir: Path) -> str:
    """The one line of a diverged run: the step, why, what to try, and the last checkpoint (read from its index)."""
    try:
        last = checkpoint.latest_name(workdir / "checkpoints") or ""
    except checkpoint.CheckpointError:
        last = ""
    saved = f"; the last checkpoint is {last} in {str(workdir / 'checkpoints')!r}" if last else ""
    return (f"step {step}: the run diverged ({reason}); try a lower `optimizer.learning_rate` or "
            f"`optimizer.clip_global_norm`{saved}")
