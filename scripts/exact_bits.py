"""Exact bits before and after a change: the SHA-256 of final.npz's parameters and the logged metrics of a set of jobs.

Trains, through the command line, exact-mode jobs in every format (wide, compact, narrow), replicated and sharded, with
several optimizers and losses, at P = 1, 2, 3, plus a stop at P = 2 resumed at P = 3, and one fast P = 1 job; writes
OUT/bits.json. Run it on the code before a restructuring and after it, and compare the two files: they must be equal
(the exactness model; DEVELOPERS.md). About 40 s on 2 cores. The data are random numbers made here.

Usage: python scripts/exact_bits.py OUT_DIR
"""

from __future__ import annotations

import hashlib
import json
import subprocess
import sys
from pathlib import Path
from typing import Any

import numpy as np

JOBS = {  # name: (loss, targets file, outputs, hidden activation, [run] keys, optimizer)
    "wide_sce_adam_sharded": ("softmax_cross_entropy", "y.npy", 3, "relu",
                              {"reduction": "exact", "exact_format": "wide", "update": "sharded"}, "adam"),
    "wide_sce_mom_repl": ("softmax_cross_entropy", "y.npy", 3, "tanh",
                          {"reduction": "exact", "exact_format": "wide", "update": "replicated"}, "momentum"),
    "compact_bce_adamw": ("binary_cross_entropy", "yb.npy", 2, "sigmoid",
                          {"reduction": "exact", "exact_format": "compact"}, "adamw"),
    "narrow_se_sgd": ("squared_error", "yr.npy", 2, "relu", {"reduction": "exact", "exact_format": "narrow"}, "sgd"),
}


def make_data(root: Path) -> None:
    rng = np.random.default_rng(3)
    X = rng.normal(size=(600, 7))
    y = (X[:, 0] * X[:, 1] + X[:, 2] > 0).astype(np.int64) + (X[:, 3] > 1)
    np.save(root / "x.npy", X)
    np.save(root / "y.npy", y)
    np.save(root / "yb.npy", np.stack([y == 1, y == 2], 1).astype(np.float64))
    np.save(root / "yr.npy", np.stack([X[:, 0] * X[:, 1], np.sin(X[:, 2])], 1))


def job_text(root: Path, name: str, job: tuple, epochs: int) -> str:
    loss, targets, k, activation, run, method = job
    keys: dict[str, Any] = {"epochs": epochs, "global_batch": 64, "exact_chunk": 16, "seed": 5,
                            "workdir": str(root / name), "health_every": 3, **run}
    lines = ["[model]", f"layers = [7, 12, 9, {k}]", f'activation = "{activation}"', f'loss = "{loss}"',
             'dtype = "float32"', "[data]", f'inputs = "{root / "x.npy"}"', f'targets = "{root / targets}"',
             "validation_fraction = 0.2", "[optimizer]", f'method = "{method}"', "learning_rate = 0.01",
             "clip_global_norm = 1.0", "[run]", *(f"{key} = {json.dumps(value)}" for key, value in keys.items())]
    return "\n".join(lines) + "\n"


def digest(path: Path) -> str:
    with np.load(path, allow_pickle=False) as saved:
        h = hashlib.sha256()
        for key in sorted(saved.files):
            if key[0] in "Wb":
                h.update(key.encode())
                h.update(np.ascontiguousarray(saved[key]).tobytes())
    return h.hexdigest()


def epochs_logged(workdir: Path) -> list:
    records = [json.loads(line) for line in (workdir / "metrics.jsonl").read_text().splitlines()]
    return [(r["epoch"], r["train"], r.get("validation")) for r in records if r["kind"] == "epoch"]


def train(args: list[str]) -> None:
    done = subprocess.run([sys.executable, "-m", "shardmill", "train", *args, "--no-progress"], capture_output=True,
                          text=True, timeout=600)
    if done.returncode:
        raise SystemExit(done.stdout + done.stderr)


def main() -> None:
    root = Path(sys.argv[1]).resolve()
    root.mkdir(parents=True, exist_ok=True)
    make_data(root)
    out: dict[str, Any] = {}
    for name, job in JOBS.items():
        for P in (1, 2, 3):
            workdir = f"{name}_p{P}"
            (root / f"{workdir}.toml").write_text(job_text(root, workdir, job, 4))
            train([str(root / f"{workdir}.toml"), "--ranks", str(P), "--fresh"])
            out[workdir] = {"sha": digest(root / workdir / "final.npz"), "metrics": epochs_logged(root / workdir)}
        workdir = f"{name}_resume"  # stopped at P = 2, resumed at P = 3
        (root / f"{workdir}.toml").write_text(job_text(root, workdir, job, 4))
        train([str(root / f"{workdir}.toml"), "--ranks", "2", "--fresh", "--set", "run.max_steps=14"])
        train([str(root / f"{workdir}.toml"), "--ranks", "3", "--resume"])
        out[workdir] = {"sha": digest(root / workdir / "final.npz")}
    fast = ("softmax_cross_entropy", "y.npy", 3, "relu", {"reduction": "fast"}, "adam")
    (root / "fast_p1.toml").write_text(job_text(root, "fast_p1", fast, 3))
    train([str(root / "fast_p1.toml"), "--fresh"])
    out["fast_p1"] = {"sha": digest(root / "fast_p1" / "final.npz"), "metrics": epochs_logged(root / "fast_p1")}
    (root / "bits.json").write_text(json.dumps(out, indent=1))
    for name, entry in out.items():
        print(name, entry["sha"][:16])


if __name__ == "__main__":
    main()
