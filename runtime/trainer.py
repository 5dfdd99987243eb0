"""Data-parallel training: every rank runs the same step on its shard of each global batch.

Read :meth:`Trainer.step` top to bottom: sample → shard → gather → forward → loss → backward (bucket
launches) → wait → update. Metrics are summed locally and reduced once per epoch.
"""

from __future__ import annotations

import json
import math
import sys
import time
from dataclasses import dataclass
from pathlib import Path
from typing import Any

import numpy as np
from shardmill import checkpoint
from shardmill.config import Job, JobError
from shardmill.data import (
    Sampler,
    Split,
    block_range,
    column_statistics,
    gather,
    read_array,
    shard,
    split_rows,
    squeeze_labels,
)
from shardmill.health import diagnose, warnings
from shardmill.kernels import exactsum, losses
from shardmill.kernels import optim as kernels_optim
from shardmill.model import MLP
from shardmill.optim import Optimizer
from shardmill.parallel.comm import Comm, agree
from shardmill.parallel.exchange import GradientExchange
from shardmill.timing import PHASES, PhaseTimer
from threadpoolctl import threadpool_limits


@dataclass
class Dataset:
    """Inputs (possibly memory-mapped), validated targets, the split, and standardisation statistics."""

    X: np.ndarray
    targets: np.ndarray
    split: Split
    mean: np.ndarray
    inv_std: np.ndarray


def model_from_job(job: Job) -> MLP:
    m = job.model
    return MLP(m.layers, activation=m.activation, loss=m.loss, dtype=m.dtype, seed=job.run.seed, init=m.init,
               output=m.output)


def load_dataset(job: Job, model: MLP, comm: Comm) -> Dataset:
    """Open and check the data on every rank; any rank's failure is raised identically on all ranks."""
    error: Exception | None = None
    X = targets = None
    try:
        if not job.data.inputs or not job.data.targets:
            raise JobError("`data.inputs` and `data.targets` must both name files")
        X = np.asarray(read_array(job.path(job.data.inputs), "data.inputs"))
        y = squeeze_labels(np.asarray(read_array(job.path(job.data.targets), "data.targets", mmap=False)))
        if X.dtype.kind not in "fiu":
            raise JobError(f"`data.inputs` must hold numbers; got dtype {X.dtype}")
        if X.dtype.kind != "f":
            X = X.astype(np.float64)
        model.check_inputs(X, "data.inputs")
        if y.shape[0] != X.shape[0]:
            raise JobError(f"`data.targets` has {y.shape[0]} rows but `data.inputs` has {X.shape[0]}")
        targets = model.check_targets(y, X.shape[0], "data.targets")
    except (JobError, OSError, MemoryError) as err:
        error = err if isinstance(err, JobError) else JobError(f"data cannot be loaded: {err}")
    agree(comm, error)
    split = split_rows(X.shape[0], job.data.validation_fraction, job.run.seed)
    if split.train.size == 0:
        raise JobError("`data.validation_fraction` leaves no training rows")
    mean, inv_std, bad = column_statistics(X, split.train if job.data.standardize else split.train[:0], comm)
    if bad < 0 and not job.data.standardize:  # the statistics pass above checked no training row
        bad = _first_nonfinite(X, split.train, comm)
    if bad < 0 and split.validation.size:
        bad = _first_nonfinite(X, split.validation, comm)
    if bad >= 0:
        raise JobError(f"`data.inputs` row {bad} holds a non-finite value (NaN or inf)")
    if not job.data.standardize:
        mean, inv_std = np.zeros(X.shape[1]), np.ones(X.shape[1])
    return Dataset(X=X, targets=targets, split=split, mean=mean, inv_std=inv_std)


def _first_nonfinite(X: np.ndarray, rows: np.ndarray, comm: Comm) -> int:
    lo, hi = block_range(rows.size, comm.rank, comm.size)
    bad = np.array([np.iinfo(np.int64).max])
    for start in range(lo, hi, 4096):  # blocks: a rank's part of a memory-mapped set may not fit in memory
        finite = np.isfinite(np.asarray(X[rows[start:min(start + 4096, hi)]])).all(axis=1)
        if not finite.all():
            bad[0] = rows[start + int(np.argmin(finite))]
            break
    comm.allreduce_min(bad)
    return -1 if bad[0] == np.iinfo(np.int64).max else int(bad[0])


class Trainer:
    """Owns the model, data, optimizer, exchange and workspaces of one job on one rank."""

    def __init__(self, job: Job, comm: Comm | None = None, dataset: Dataset | None = None) -> None:
        self.job = job
        self.comm = comm or Comm()
        run = job.run
        P, G = self.comm.size, run.global_batch
        if G < P:
            raise JobError(f"`run.global_batch` must be ≥ the number of processes {P}; got {G}")
        if run.reduction == "exact" and G // run.exact_chunk < P:
            raise JobError(f"`run.reduction` = 'exact' needs at least one chunk per process: global_batch / "
                           f"exact_chunk = {G // run.exact_chunk} chunks < {P} processes")
        self.model = model_from_job(job)
        self.data = dataset if dataset is not None else load_dataset(job, self.model, self.comm)
        self.sampler = Sampler(self.data.split.train, G, run.seed)
        self.optimizer = Optimizer(job.optimizer, self.model.n_params, self.model.dtype)
        self.grads = np.zeros_like(self.model.params)
        self.exact = run.reduction == "exact"
        rows = run.exact_chunk if self.exact else -(-G // P)
        self.ws = self.model.workspace(rows)
        self.batch_targets = np.zeros((rows,) + self.data.targets.shape[1:], dtype=self.data.targets.dtype)
        self.exchange = GradientExchange(self.comm, self.model, self.grads, run.bucket_mb, run.overlap)
        if self.exact:
            self.chunk_grads = np.zeros_like(self.grads)
            # A rank with two or more chunks computes its first two into separate buffers and writes their
            # digits in one pass (exactsum.assign_pair): one read-and-write of the limbs fewer per step.
            most_chunks = -(-(run.global_batch // run.exact_chunk) // P)
            self.pair_grads = np.zeros_like(self.grads) if most_chunks >= 2 else None
            self.limbs = np.zeros((exactsum.LIMBS, self.model.n_params), dtype=np.int64)
            # Each rank reads back its own contiguous slice of the reduced limbs (reduce-scatter), then the
            # float gradient is allgathered: half the integer traffic of an allreduce, and 1/P of the read-back.
            bounds = [block_range(self.model.n_params, r, P) for r in range(P)]
            self.slice_counts = [hi - lo for lo, hi in bounds]
            self.slice = slice(*bounds[self.comm.rank])
            self.slice_limbs = np.zeros((exactsum.LIMBS, self.slice_counts[self.comm.rank]), dtype=np.int64)
            self.loss_limbs = np.zeros((exactsum.LIMBS, 1), dtype=np.int64)
            self.loss_value = np.zeros(1, dtype=np.float64)
        self.step_count = 0  # global steps completed
        self.total_steps = self.planned_steps()
        # The schedule spans all epochs; run.max_steps only stops early, so a stopped run resumes onto the same curve.
        self.schedule_steps = run.epochs * self.sampler.steps_per_epoch
        self.timer = PhaseTimer()
        self.sums = np.zeros(3)  # loss sum, correct, counted (local, since the last reduce)
        self.health: list[dict[str, Any]] = []  # diagnostics records not yet written
        if not self.comm.all_equal(self.model.params):
            raise RuntimeError("initial parameters differ across ranks")

    def planned_steps(self) -> int:
        total = self.job.run.epochs * self.sampler.steps_per_epoch
        return min(total, self.job.run.max_steps) if self.job.run.max_steps else total

    def gather_targets(self, rows: np.ndarray) -> np.ndarray:
        np.take(self.data.targets, rows, axis=0, out=self.batch_targets[:rows.size])
        return self.batch_targets

    def compute_shard(self, rows: np.ndarray, grads: np.ndarray, launch: bool) -> float:
        """Gradient of this rank's rows into ``grads`` (scaled by 1/G); returns the local loss sum."""
        n, G = rows.size, self.job.run.global_batch
        gather(self.data.X, rows, self.data.mean, self.data.inv_std, self.ws.inputs)
        targets = self.gather_targets(rows)
        self.timer.lap("data")
        loss_sum = self.ws.forward_loss(n, targets, 1.0 / G)
        self.sums += (loss_sum, self.count_correct(n, targets), n)
        self.timer.lap("forward")
        for layer, _ in self.ws.backward(n, grads):
            if launch:
                self.exchange.layer_done(layer)
        self.timer.lap("backward")
        return loss_sum

    def count_correct(self, n: int, targets: np.ndarray) -> int:
        loss = self.model.loss_code
        if loss == losses.SOFTMAX_CROSS_ENTROPY:
            return losses.count_correct(self.ws.O[:n], targets[:n])  # O holds the softmax of this batch
        if loss == losses.BINARY_CROSS_ENTROPY:
            return losses.count_correct_binary(self.ws.O[:n], targets[:n])
        return 0

    def step(self, epoch: int, step_in_epoch: int) -> None:
        """One global step of G samples, identical in effect on every rank."""
        self.timer.start()
        rows = self.sampler.batch(epoch, step_in_epoch)  # sample: the G global indices
        if self.exact:
            self.exact_gradient(rows)
        else:
            mine = shard(rows, self.comm.rank, self.comm.size)  # shard: contiguous [lo, hi)
            self.compute_shard(mine, self.grads, launch=True)  # gather, forward, loss, backward + launches
            self.exchange.wait()  # every bucket reduced: the full-batch mean gradient
        self.timer.lap("exchange")
        self.optimizer.clip(self.grads)
        health = self.job.run.health_every and (self.step_count + 1) % self.job.run.health_every == 0
        before = self.model.params.copy() if health else None
        self.optimizer.step(self.model.params, self.grads, self.schedule_steps)  # update
        self.timer.lap("update")
        self.step_count += 1
        if health:
            n = self.job.run.exact_chunk if self.exact else shard(rows, self.comm.rank, self.comm.size).size
            self.health.append(diagnose(self.model, self.ws, n, self.grads, before, self.comm, self.step_count))
        every = self.job.run.check_every
        if every and self.step_count % every == 0 and not self.comm.all_equal(self.model.params):
            raise RuntimeError(f"parameters drifted apart across ranks at step {self.step_count}")

    def exact_gradient(self, rows: np.ndarray) -> None:
        """Exact mode: fixed chunks of the global batch, each gradient accumulated exactly (fixed point).

        Chunk k is rows[k·c:(k+1)·c] whatever P is, so every chunk's gradient has the same bits on any rank;
        integer sums are associative, so the reduced gradient does not depend on P or on reduction order.
        """
        c = self.job.run.exact_chunk
        lo, hi = block_range(rows.size // c, self.comm.rank, self.comm.size)  # hi > lo: checked in __init__

        def chunk_gradient(k: int, out: np.ndarray) -> None:
            self.loss_value[0] = self.compute_shard(rows[k * c:(k + 1) * c], out, launch=False)
            exactsum.accumulate(self.loss_value, self.loss_limbs)  # the chunk's loss sum, kept until take_train_sums

        first = lo
        if hi - lo >= 2:  # the first two chunks overwrite the limbs in one pass
            chunk_gradient(lo, self.chunk_grads)
            chunk_gradient(lo + 1, self.pair_grads)
            self.check_range(exactsum.assign_pair(self.chunk_grads, self.pair_grads, self.limbs))
            self.timer.lap("backward")
            first = lo + 2
        for k in range(first, hi):
            chunk_gradient(k, self.chunk_grads)
            # A first chunk overwrites the limbs: no zeroing pass, no read.
            self.check_range(exactsum.accumulate(self.chunk_grads, self.limbs, replace=k == lo))
            self.timer.lap("backward")
        if self.comm.size == 1:
            exactsum.to_float(self.limbs, self.grads)
            return
        self.reduce_scatter_limbs()
        exactsum.to_float(self.slice_limbs, self.grads[self.slice])
        self.comm.allgather(self.grads, self.slice_counts)

    def reduce_scatter_limbs(self) -> None:
        """This rank's slice of the limbs summed over ranks, into ``slice_limbs``.

        One call per limb row: MPICH slows sharply on single messages past ~22 MB.
        """
        for limb, mine in zip(self.limbs, self.slice_limbs, strict=True):
            self.comm.reduce_scatter_sum(limb, mine, self.slice_counts)

    @staticmethod
    def check_range(largest: float) -> None:
        """Stop on a chunk gradient the exact accumulator cannot hold (|g| ≥ 2^31, inf or NaN)."""
        if not largest < exactsum.MAX_ABS:
            raise FloatingPointError(f"gradient element {largest!r} is outside the exact accumulator's "
                                     f"range (|g| < 2^31)")

    def take_train_sums(self) -> np.ndarray:
        """The training (loss sum, correct, rows) since the last call, summed over ranks; resets them.

        In exact mode the loss sum is the exact sum of the chunks' loss sums, so it does not depend on P;
        the counts are integers held in float64, exact below 2**53 in any order.
        """
        sums = self.sums.copy()
        self.comm.allreduce_sum(sums)
        self.sums[:] = 0.0
        if self.exact:
            self.reduce_exact(self.loss_limbs, sums[:1])
            self.loss_limbs.fill(0)
        return sums

    def reduce_exact(self, limbs: np.ndarray, out: np.ndarray) -> None:
        """Sum a small (LIMBS, k) accumulator over ranks, in place, and write its k values into ``out``."""
        self.comm.allreduce_sum(limbs.reshape(-1))
        exactsum.to_float(limbs, out)

    def evaluate(self, rows: np.ndarray) -> dict[str, float]:
        """Loss and accuracy (or RMSE) over ``rows``, reduced over ranks.

        Fast mode: each rank takes a contiguous part. Exact mode: the rows are cut into chunks of
        ``exact_chunk`` whatever P is, each rank takes a contiguous run of chunks, and the chunks' float64
        sums are added exactly, so the result has the same bits for every P.
        """
        width = self.ws.rows
        if self.exact:
            lo, hi = block_range(-(-rows.size // width), self.comm.rank, self.comm.size)
            part = rows[lo * width:hi * width]
        else:
            lo, hi = block_range(rows.size, self.comm.rank, self.comm.size)
            part = rows[lo:hi]
        sums = np.zeros(3)  # loss sum, correct or squared-error sum, rows
        exact_sums = np.zeros((exactsum.LIMBS, 2), dtype=np.int64) if self.exact else None
        chunk_sums = np.zeros(2)  # this chunk's loss sum and correct or squared-error sum
        for start in range(0, part.size, width):
            chunk = part[start:start + width]
            n = chunk.size
            gather(self.data.X, chunk, self.data.mean, self.data.inv_std, self.ws.inputs)
            targets = self.gather_targets(chunk)
            chunk_sums[0] = self.ws.forward_loss(n, targets, 0.0)
            if self.model.loss == "squared_error":
                chunk_sums[1] = losses.squared_error_sum(self.ws.O[:n], targets[:n])
            else:
                chunk_sums[1] = self.count_correct(n, targets)
            if exact_sums is not None:
                exactsum.accumulate(chunk_sums, exact_sums)
            else:
                sums[:2] += chunk_sums
            sums[2] += n
        self.comm.allreduce_sum(sums)
        if exact_sums is not None:
            self.reduce_exact(exact_sums, sums[:2])
        return self.summarise(sums)

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
        trainer.count_correct(rows.size, targets)
        for _ in trainer.ws.backward(rows.size, grads):
            pass
        scratch = Optimizer(trainer.job.optimizer, grads.size, grads.dtype)
        scratch.clip(grads)
        kernels_optim.sum_squares(grads)
        kernels_optim.scale(grads, 1.0)
        scratch.step(trainer.model.params.copy(), grads, 1)
        if trainer.exact:
            limbs = np.zeros((exactsum.LIMBS, grads.size), dtype=np.int64)
            exactsum.accumulate(grads, limbs)
            exactsum.accumulate(np.zeros(1), limbs[:, :1].copy())
            exactsum.to_float(limbs, grads)

    if comm.rank == 0:
        run()
    comm.barrier()
    if comm.rank != 0:
        run()
    comm.barrier()  # nobody's first timed step waits for another rank's compilation
    return time.perf_counter() - begin


def train(job: Job, comm: Comm | None = None, resume: bool = False, progress: bool = True) -> dict[str, Any]:
    """Train ``job`` on every rank of ``comm`` (MPI.COMM_WORLD by default).

    Rank 0 writes ``workdir/metrics.jsonl`` (one JSON object per epoch), checkpoints and
    ``workdir/final.npz`` (arrays W0, b0, W1, b1, …). Returns a summary dict on every rank, including
    the final model under ``"model"``.
    """
    comm = comm or Comm()
    with threadpool_limits(limits=job.run.threads, user_api="blas"):
        trainer = Trainer(job, comm)
        return _train_loop(trainer, resume, progress)


def _train_loop(trainer: Trainer, resume: bool, progress: bool) -> dict[str, Any]:
    job, comm, model = trainer.job, trainer.comm, trainer.model
    workdir = job.workdir
    lead = comm.rank == 0
    compile_s = warm_up_kernels(trainer)
    start_step = 0
    if resume:
        start_step = checkpoint.resume(trainer)
    if lead:
        workdir.mkdir(parents=True, exist_ok=True)
    steps_per_epoch = trainer.sampler.steps_per_epoch
    total = trainer.total_steps
    history: list[dict[str, Any]] = []
    bar = _progress_bar(total, start_step, lead and progress)
    metrics_path = workdir / "metrics.jsonl"
    epoch_begin = time.perf_counter()
    epoch_steps = 0
    step = start_step
    while step < total:
        epoch, in_epoch = divmod(step, steps_per_epoch)
        trainer.step(epoch, in_epoch)
        step += 1
        epoch_steps += 1
        if bar is not None:
            bar.update(1)
        end_of_epoch = step % steps_per_epoch == 0 or step == total
        if trainer.health:
            _write_health(trainer, metrics_path, lead)
        if job.run.save_every and step % job.run.save_every == 0 and step < total:
            checkpoint.save(trainer, step)
        if end_of_epoch:
            seconds = time.perf_counter() - epoch_begin
            record = _epoch_record(trainer, epoch, step, epoch_steps, seconds, compile_s)
            history.append(record)
            if lead:
                with open(metrics_path, "a") as out:
                    out.write(json.dumps(record) + "\n")
                if bar is not None:
                    bar.set_postfix(loss=f"{record['train']['loss']:.4g}",
                                    samples_s=f"{record['samples_per_s']:.0f}")
            epoch_begin = time.perf_counter()
            epoch_steps = 0
    if bar is not None:
        bar.close()
    checkpoint.save(trainer, step)
    if lead:
        checkpoint.write_final(workdir / "final.npz", trainer)
    return {"model": model, "history": history, "steps": step, "workdir": str(workdir),
            "processes": comm.size, "compile_s": compile_s}


def _write_health(trainer: Trainer, path: Path, lead: bool) -> None:
    """Append pending health records to metrics.jsonl and print their warnings (rank 0)."""
    if lead:
        with open(path, "a") as out:
            for record in trainer.health:
                out.write(json.dumps(record) + "\n")
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
        "learning_rate": _current_lr(trainer),
        "seconds": float(seconds_max[0]),
        "samples_per_s": float(steps * job.run.global_batch / max(seconds_max[0], 1e-12)),
        "phase_seconds_max": phase_max,
        "phase_seconds_mean": phase_mean,
        "compile_s": compile_s,
    }
    if trainer.data.split.validation.size:
        record["validation"] = trainer.evaluate(trainer.data.split.validation)
    return record


def _current_lr(trainer: Trainer) -> float:
    """The learning rate of the last update (the base rate before any update)."""
    from shardmill.optim import learning_rate

    if trainer.optimizer.updates == 0:
        return trainer.optimizer.spec.learning_rate
    return learning_rate(trainer.optimizer.spec, trainer.optimizer.updates - 1, trainer.schedule_steps)

