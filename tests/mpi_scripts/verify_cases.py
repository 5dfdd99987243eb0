"""Run under ``mpiexec -n P``: ``training.verify.verify`` on several jobs, honest and with tampered reductions.

Usage: ``python verify_cases.py SPEC.json OUT.json``. SPEC holds ``{"base": folder, "cases": [{"name", "job",
"trajectory"}]}``. For each case three reports are made on the same batches:

- ``plain``: the reduction as training does it;
- ``drop``: after the reduction every rank subtracts rank 1's share of the batch (a reduction that lost one
  rank's contribution). The share is recomputed independently with ``MLP.loss_and_grad`` on rank 1's rows,
  standardised here, on a model built fresh from the job (verify does not update parameters), times n₁/G;
  OUT records, per tensor, the largest |share| so the test can compare it with the reported difference;
- ``perturb``: the element of largest |g| gets a relative change of 1e-3; OUT records the tensor and |Δ|.

Rank 0 writes OUT (JSON).
"""

from __future__ import annotations

import json
import sys

import numpy as np
from mpi4py import MPI
from shardmill.config import job_from_dict
from shardmill.parallel.comm import Comm
from shardmill.training.trainer import Trainer
from shardmill.training.verify import verify

RELATIVE_CHANGE = 1e-3


def rank_share(ref: Trainer, rows: np.ndarray, rank: int, size: int) -> np.ndarray:
    """Rank ``rank``'s contribution to the reduced gradient of ``rows`` (flat, params layout, model dtype).

    Written out here on purpose, not taken from the exchange strategy: the tamper must not share code with
    what it checks (fast: a contiguous shard per rank; exact: a contiguous run of whole chunks per rank).
    """
    G = rows.size

    def share(n: int) -> tuple[int, int]:  # rank's contiguous share of n items: ⌊r·n/P⌋ to ⌊(r+1)·n/P⌋
        return (rank * n) // size, ((rank + 1) * n) // size

    if ref.job.run.reduction == "exact":  # exact mode: whole chunks per rank
        c = ref.job.run.exact_chunk
        lo, hi = (c * k for k in share(G // c))
    else:
        lo, hi = share(G)
    mine = rows[lo:hi]
    X = (np.asarray(ref.data.X[mine], dtype=np.float64) - ref.data.mean) * ref.data.inv_std
    _, mean_grad = ref.model.loss_and_grad(X.astype(ref.model.dtype), ref.data.targets[mine])
    return (mean_grad.astype(np.float64) * (mine.size / G)).astype(ref.model.dtype)


class DropRankShare:
    """Tamper: subtract rank ``rank``'s share of each batch from the reduced gradient (batch 0, 1, … in turn)."""

    def __init__(self, ref: Trainer, rank: int, size: int) -> None:
        self.ref, self.rank, self.size, self.batch = ref, rank, size, 0
        self.largest = dict.fromkeys(ref.model.names(), 0.0)

    def __call__(self, grads: np.ndarray, _comm: Comm) -> None:
        share = rank_share(self.ref, self.ref.sampler.batch(0, self.batch), self.rank, self.size)
        for name, view in self.ref.model.named(share).items():
            self.largest[name] = max(self.largest[name], float(np.abs(view).max()))
        grads -= share
        self.batch += 1


class PerturbLargest:
    """Tamper: multiply the element of largest |g| by 1 + RELATIVE_CHANGE; records its tensor and |Δ|."""

    def __init__(self, ref: Trainer) -> None:
        self.ref, self.delta, self.tensor = ref, 0.0, ""

    def __call__(self, grads: np.ndarray, _comm: Comm) -> None:
        i = int(np.argmax(np.abs(grads)))
        before = float(grads[i])
        grads[i] = grads[i] * (1 + RELATIVE_CHANGE)
        self.delta = max(self.delta, abs(float(grads[i]) - before))
        marker = np.zeros(grads.size)
        marker[i] = 1.0
        self.tensor = next(name for name, view in self.ref.model.named(marker).items() if view.any())


def main() -> None:
    spec_path, out_path = sys.argv[1], sys.argv[2]
    with open(spec_path) as f:
        spec = json.load(f)
    comm = Comm()
    out: dict = {"processes": comm.size, "cases": {}}
    for case in spec["cases"]:
        job = job_from_dict(case["job"], base=spec["base"])
        ref = Trainer(job, Comm(MPI.COMM_SELF))  # this rank alone: data, sampler and the initial model
        batches = case.get("batches", 3)
        plain = verify(job, comm, batches=batches, trajectory=case.get("trajectory", 0))
        drop = DropRankShare(ref, 1, comm.size)
        lost = verify(job, comm, batches=batches, tamper=drop)
        perturb = PerturbLargest(ref)
        wrong = verify(job, comm, batches=1, tamper=perturb)
        if comm.rank == 0:
            out["cases"][case["name"]] = {"plain": plain, "drop": {"report": lost, "largest_share": drop.largest},
                                          "perturb": {"report": wrong, "delta": perturb.delta,
                                                      "tensor": perturb.tensor}}
    if comm.rank == 0:
        with open(out_path, "w") as f:
            json.dump(out, f)


if __name__ == "__main__":
    main()
