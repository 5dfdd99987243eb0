"""``shardmill demo``: a synthetic pump-monitoring data set, trained on several ranks, then verified.

Scenario (invented for the demo): a fleet of centrifugal pumps reports 16 sensor features per
one-minute window; each window is healthy or shows one of four faults. Faults leave nonlinear
signatures that depend on the operating point (speed and load), so no single sensor separates them.
Each pump is of one of four types and stands at one of three sites; both shift the sensors' baselines
(a multistage pump's discharge pressure, a desert site's temperatures), so the same reading means a
fault at one pump and nothing at another: the two categorical columns carry part of the answer.
"""

from __future__ import annotations

import json
import os
import sys
import time
from pathlib import Path

import numpy as np
from shardmill.errors import JobError
from shardmill.parallel.launch import relaunch

CLASSES = ("healthy", "cavitation", "bearing_wear", "impeller_imbalance", "seal_leak")
FEATURES = ("speed_rpm", "load", "flow", "suction_kpa", "discharge_kpa", "motor_current", "power_factor",
            "vib_1x", "vib_2x", "vib_hf", "bearing_temp", "casing_temp", "acoustic", "pressure_ripple",
            "flow_per_amp", "head_ratio")


PUMP_TYPES = ("end_suction", "split_case", "vertical_inline", "multistage")
SITES = ("north_yard", "river_intake", "desert_depot")


def pump_windows(rows: int, seed: int = 0) -> tuple[np.ndarray, np.ndarray, dict[str, np.ndarray]]:
    """(X, y, kinds): ``rows`` windows of the 16 FEATURES (float32), their fault class in 0..4 (int64) and
    {"pump_type": (rows,) text of PUMP_TYPES, "site": (rows,) text of SITES}."""
    rng = np.random.default_rng(seed)
    y = rng.integers(0, len(CLASSES), size=rows)
    pump_type = rng.integers(0, len(PUMP_TYPES), size=rows)
    site = rng.integers(0, len(SITES), size=rows)
    speed = rng.uniform(1200.0, 3600.0, rows)
    load = rng.uniform(0.3, 1.0, rows)
    s = speed / 3000.0
    severity = rng.uniform(0.3, 1.0, rows)
    f = {name: np.zeros(rows) for name in FEATURES}
    f["speed_rpm"] = speed
    f["load"] = load
    flow = 100.0 * s * load
    suction = 180.0 - 40.0 * s * s * load
    discharge = 350.0 * s * s + 60.0 * load
    current = 20.0 + 35.0 * load * s**1.5
    vib1 = 0.8 * s * s
    vib2 = 0.3 * s
    vibhf = 0.2 + 0.1 * load
    bearing = 45.0 + 20.0 * load * s
    casing = 35.0 + 10.0 * load
    acoustic = 55.0 + 10.0 * s
    ripple = 2.0 + 1.5 * load
    # the type and the site move the baselines the faults are read against
    multistage, inline, split_case = pump_type == 3, pump_type == 2, pump_type == 1
    discharge *= np.where(multistage, 1.5, 1.0)
    current += 6.0 * multistage
    vib1 += 0.5 * inline
    flow *= np.where(split_case, 1.3, 1.0)
    desert, river = site == 2, site == 1
    bearing += 10.0 * desert
    casing += 10.0 * desert
    acoustic += 6.0 * river
    vibhf += 0.3 * river
    cav, bear, imb, leak = (y == 1) * severity, (y == 2) * severity, (y == 3) * severity, (y == 4) * severity
    suction -= 35.0 * cav * load
    acoustic += 9.0 * cav * (suction < 150.0)
    ripple *= 1.0 + 1.4 * cav * s
    flow *= 1.0 - 0.12 * cav
    vibhf += 0.9 * bear * s
    bearing += 12.0 * bear * load
    vib2 += 0.25 * bear
    vib1 += 1.6 * imb * s * s
    vib2 += 0.2 * imb * s
    current += 3.0 * imb
    flow *= 1.0 - 0.22 * leak * load
    casing += 6.0 * leak
    discharge -= 40.0 * leak * s
    noise = {"flow": 3.0, "suction_kpa": 5.0, "discharge_kpa": 10.0, "motor_current": 1.5, "vib_1x": 0.12,
             "vib_2x": 0.06, "vib_hf": 0.08, "bearing_temp": 2.5, "casing_temp": 2.0, "acoustic": 2.5,
             "pressure_ripple": 0.5}
    f.update({"flow": flow, "suction_kpa": suction, "discharge_kpa": discharge, "motor_current": current,
              "vib_1x": vib1, "vib_2x": vib2, "vib_hf": vibhf, "bearing_temp": bearing, "casing_temp": casing,
              "acoustic": acoustic, "pressure_ripple": ripple})
    for name, sigma in noise.items():
        f[name] = f[name] + rng.normal(0.0, sigma, rows)
    f["power_factor"] = 0.75 + 0.15 * load - 0.02 * (y == 3) + rng.normal(0, 0.02, rows)
    f["flow_per_amp"] = f["flow"] / f["motor_current"]
    f["head_ratio"] = f["discharge_kpa"] / np.maximum(f["suction_kpa"], 1.0)
    X = np.stack([f[name] for name in FEATURES], axis=1).astype(np.float32)
    kinds = {"pump_type": np.asarray(PUMP_TYPES)[pump_type], "site": np.asarray(SITES)[site]}
    return X, y.astype(np.int64), kinds


JOB = """# shardmill demo: pump fault classification from 16 sensor features, the pump's type and its site
[model]
layers = [18, 128, 128, 5]   # 16 sensor columns + 2 categorical ones (each counted once)
activation = "relu"
loss = "softmax_cross_entropy"
dtype = "float32"
norm = "layer"               # layer normalisation in every hidden layer
dropout = 0.1                # inverted dropout, the same mask for every process count
residual = true              # a skip around the 128 → 128 layer

[data]
inputs = "pumps.csv"
target = "fault"
categorical = ["pump_type", "site"]   # learned embeddings; the other columns are the sensor features
validation_fraction = 0.2
standardize = true

[optimizer]
method = "adam"
learning_rate = 0.003
schedule = "cosine"
warmup = 20

[run]
epochs = {epochs}
global_batch = 256
seed = 1
workdir = "run"
"""


def write_demo_files(out: Path, rows: int, epochs: int, extra_run: str = "") -> tuple[np.ndarray, np.ndarray]:
    """The demo's files in ``out``: ``pumps.csv`` (a header row; the 16 sensor features, pump_type, site and the
    fault label), the numeric part alone as ``windows.npy`` (rows, 16) float32 and ``faults.npy`` (rows,) int64,
    and ``job.toml`` (``extra_run``: lines appended to its [run] table). Returns (X, y)."""
    X, y, kinds = pump_windows(rows, seed=0)
    np.save(out / "windows.npy", X)
    np.save(out / "faults.npy", y)
    with open(out / "pumps.csv", "w") as f:
        f.write(",".join((*FEATURES, "pump_type", "site", "fault")) + "\n")
        for i in range(rows):
            f.write(",".join([*(f"{v:.9g}" for v in X[i].tolist()), str(kinds["pump_type"][i]), str(kinds["site"][i]),
                              str(int(y[i]))]) + "\n")
    (out / "job.toml").write_text(JOB.format(epochs=epochs) + extra_run)
    return X, y


def cmd_demo(args) -> int:
    if args.rows < 400:  # the demo job: G = 256 from the 80 % of rows that are not held out
        raise JobError(f"`--rows` must be ≥ 400 (the demo trains with 256 rows per step on 80 % of them); got "
                       f"{args.rows}")
    out = Path(args.out_dir)
    out.mkdir(parents=True, exist_ok=True)
    ranks = args.ranks or max(1, min(4, os.cpu_count() or 1))
    X, y = write_demo_files(out, args.rows, args.epochs)
    counts = np.bincount(y, minlength=len(CLASSES))
    print(f"demo: {args.rows} pump windows × {X.shape[1]} sensor features, {len(PUMP_TYPES)} pump types at "
          f"{len(SITES)} sites, classes "
          + ", ".join(f"{c} {n}" for c, n in zip(CLASSES, counts, strict=True)) + f" → {out}")
    print(f"demo: training on {ranks} process(es): shardmill train {out / 'job.toml'} --ranks {ranks}")
    sys.stdout.flush()
    job = str(out / "job.toml")
    begin = time.perf_counter()
    code = relaunch(ranks, ["train", job, "--no-progress", "--fresh"], timeout=600)  # the demo regenerates it all
    if code != 0:
        return code
    seconds = time.perf_counter() - begin
    records = [json.loads(line) for line in (out / "run" / "metrics.jsonl").read_text().splitlines()]
    last = [record for record in records if record.get("kind") == "epoch"][-1]
    print(f"demo: trained in {seconds:.1f} s; held-out accuracy {last['validation']['accuracy']:.3f}")
    print(f"demo: does the {ranks}-process gradient equal the serial one? shardmill verify {job} --ranks {ranks}")
    sys.stdout.flush()
    return relaunch(ranks, ["verify", job, "--out", str(out / "verify.json")], timeout=600)
