"""Data-parallel agreement under a real mpiexec at P = 1, 2, 3, 4 (oversubscribed on small machines).

One run of ``mpi_scripts/consistency.py`` per P computes every case (reduced gradients, short trainings);
the expectations come from an independent computation in this process: gradients by automatic
differentiation (the ``autograd`` package) and Adam written out from Kingma & Ba 2015, Algorithm 1.
"""

from __future__ import annotations

import hashlib
import json
from pathlib import Path

import autograd.numpy as anp
import numpy as np
import pytest
from autograd import grad
from helpers import make_classification, run_cli, run_mpi, write_job

pytestmark = pytest.mark.mpi

SCRIPTS = Path(__file__).parent / "mpi_scripts"
RANKS = (1, 2, 3, 4)
LAYERS = [6, 16, 8, 3]
ROWS, VALIDATION = 60, 0.2  # 48 training rows
ADAM = {"method": "adam", "learning_rate": 0.01, "beta1": 0.9, "beta2": 0.999, "eps": 1e-8}
STEPS = 5  # crosses an epoch boundary for G = 10 and G = 12 (4 steps per epoch)


def job(layers: list[int], activation: str, run: dict, optimizer: dict | None = None) -> dict:
    return {"model": {"layers": layers, "activation": activation, "loss": "softmax_cross_entropy",
                      "dtype": "float64"},
            "data": {"inputs": "x.npy", "targets": "y.npy", "validation_fraction": VALIDATION},
            "optimizer": optimizer or {"method": "sgd", "learning_rate": 0.05},
            "run": {"seed": 3, **run}}


TINY_MESSAGES = {"message_mib": 1e-4}  # 100 bytes: every layer closes its own message, so several are in flight
CASES = [
    {"name": "grad_fast_g10", "kind": "gradient",
     "job": job(LAYERS, "tanh", {"global_batch": 10, **TINY_MESSAGES})},
    {"name": "grad_fast_g7_relu", "kind": "gradient",
     "job": job([6, 12, 3], "relu", {"global_batch": 7, **TINY_MESSAGES})},
    {"name": "grad_exact_g10", "kind": "gradient",
     "job": job(LAYERS, "tanh", {"global_batch": 10, "reduction": "exact", "exact_chunk": 2})},
    {"name": "train_fast", "kind": "train", "steps": STEPS,
     "job": job(LAYERS, "tanh", {"global_batch": 10, "check_every": 1, **TINY_MESSAGES}, ADAM)},
    {"name": "train_fast_no_overlap", "kind": "train", "steps": STEPS,
     "job": job(LAYERS, "tanh", {"global_batch": 10, "overlap": False, **TINY_MESSAGES}, ADAM)},
    {"name": "train_exact", "kind": "train", "steps": STEPS,
     "job": job(LAYERS, "tanh", {"global_batch": 12, "reduction": "exact", "exact_chunk": 3}, ADAM)},
]
# The sharded update: a model of 1587 parameters, 7 owner blocks of 256, so P = 2, 3, 4 own uneven slices.
WIDE = [6, 48, 24, 3]
CLIPPED = {**ADAM, "clip_global_norm": 0.05}  # small enough to clip every step
for update in ("replicated", "sharded"):
    CASES += [
        {"name": f"wide_fast_{update}", "kind": "train", "steps": STEPS,
         "job": job(WIDE, "tanh", {"global_batch": 10, "check_every": 1, "update": update, **TINY_MESSAGES}, CLIPPED)},
        {"name": f"wide_exact_{update}", "kind": "train", "steps": STEPS,
         "job": job(WIDE, "tanh", {"global_batch": 12, "reduction": "exact", "exact_chunk": 3, "check_every": 1,
                                   "update": update}, CLIPPED)},
    ]
# A model of 83 parameters: one owner block, so one rank owns everything and the others nothing, yet every rank
# must run the sharded collectives (clip norm, health norms, allgathers) in step.
TINY = [6, 8, 3]
HEALTHY = {"check_every": 1, "health_every": 1}
for update in ("replicated", "sharded"):
    CASES += [
        {"name": f"tiny_fast_{update}", "kind": "train", "steps": STEPS,
         "job": job(TINY, "tanh", {"global_batch": 10, "update": update, **HEALTHY, **TINY_MESSAGES}, CLIPPED)},
        {"name": f"tiny_exact_{update}", "kind": "train", "steps": STEPS,
         "job": job(TINY, "tanh", {"global_batch": 12, "reduction": "exact", "exact_chunk": 3, "update": update,
                                   **HEALTHY}, CLIPPED)},
    ]
CASES += [
    {"name": "wide_fast_sharded_thread", "kind": "train", "steps": STEPS,
     "job": job(WIDE, "tanh", {"global_batch": 10, "update": "sharded", "comm_driver": "thread", **TINY_MESSAGES},
                CLIPPED)},
    {"name": "train_fast_thread", "kind": "train", "steps": STEPS,
     "job": job(LAYERS, "tanh", {"global_batch": 10, "check_every": 1, "comm_driver": "thread", **TINY_MESSAGES},
                ADAM)},
    {"name": "wide_fast_sharded_no_overlap", "kind": "train", "steps": STEPS,
     "job": job(WIDE, "tanh", {"global_batch": 10, "update": "sharded", "overlap": False}, CLIPPED)},
    {"name": "train_exact_compact", "kind": "train", "steps": STEPS,
     "job": job(LAYERS, "tanh", {"global_batch": 12, "reduction": "exact", "exact_chunk": 3, "exact_format": "compact"},
                ADAM)},
    {"name": "wide_exact_compact_sharded", "kind": "train", "steps": STEPS,
     "job": job(WIDE, "tanh", {"global_batch": 12, "reduction": "exact", "exact_chunk": 3, "exact_format": "compact",
                               "update": "sharded", "check_every": 1}, CLIPPED)},
    {"name": "wide_exact_compact_replicated", "kind": "train", "steps": STEPS,
     "job": job(WIDE, "tanh", {"global_batch": 12, "reduction": "exact", "exact_chunk": 3, "exact_format": "compact"},
                CLIPPED)},
    {"name": "train_exact_narrow", "kind": "train", "steps": STEPS,
     "job": job(LAYERS, "tanh", {"global_batch": 12, "reduction": "exact", "exact_chunk": 3, "exact_format": "narrow"},
                ADAM)},
    {"name": "wide_exact_narrow_sharded", "kind": "train", "steps": STEPS,
     "job": job(WIDE, "tanh", {"global_batch": 12, "reduction": "exact", "exact_chunk": 3, "exact_format": "narrow",
                               "update": "sharded"}, CLIPPED)},
    {"name": "train_exact_sharded", "kind": "train", "steps": STEPS,
     "job": job(LAYERS, "tanh", {"global_batch": 12, "reduction": "exact", "exact_chunk": 3, "update": "sharded"},
                ADAM)},
]
GRADIENT_CASES = [c["name"] for c in CASES if c["kind"] == "gradient"]
ACTIVATION = {c["name"]: c["job"]["model"]["activation"] for c in CASES}


@pytest.fixture(scope="module")
def data_dir(tmp_path_factory) -> Path:
    path = tmp_path_factory.mktemp("consistency")
    make_classification(path, rows=ROWS, features=6, classes=3, seed=11)
    return path


@pytest.fixture(scope="module")
def runs(data_dir: Path) -> dict[int, dict]:
    """{P: results of consistency.py at P processes}."""
    spec = data_dir / "spec.json"
    spec.write_text(json.dumps({"base": str(data_dir), "cases": CASES}))
    out = {}
    for P in RANKS:
        result = data_dir / f"result-{P}.json"
        proc = run_mpi(P, [str(SCRIPTS / "consistency.py"), str(spec), str(result)], timeout=120)
        assert proc.returncode == 0, proc.stderr[-3000:]
        out[P] = json.loads(result.read_text())
        assert out[P]["processes"] == P
    return out


# ---------------------------------------------------------------- independent reference (autograd)

def flat(named: dict[str, list]) -> np.ndarray:
    return np.concatenate([np.ravel(np.asarray(named[k], dtype=np.float64)) for k in sorted(named)])


def tensors(named: dict[str, list], layers: int) -> list[np.ndarray]:
    out = []
    for l in range(layers):
        out += [np.asarray(named[f"W{l}"], dtype=np.float64), np.asarray(named[f"b{l}"], dtype=np.float64)]
    return out


def mean_cross_entropy(theta: list, X, y, activation: str):
    """Mean softmax cross-entropy of an MLP, written directly in autograd.numpy."""
    A = X
    L = len(theta) // 2
    for l in range(L):
        Z = anp.dot(A, theta[2 * l]) + theta[2 * l + 1]
        if l < L - 1:
            A = anp.tanh(Z) if activation == "tanh" else anp.maximum(Z, 0.0)
        else:
            A = Z
    shift = anp.max(A, axis=1, keepdims=True)
    log_z = anp.log(anp.sum(anp.exp(A - shift), axis=1)) + shift[:, 0]
    picked = anp.sum(A * (y[:, None] == anp.arange(A.shape[1])[None, :]), axis=1)
    return anp.mean(log_z - picked)


reference_gradient = grad(mean_cross_entropy)


def standardised(data_dir: Path, rows: list[int], mean: list[float], inv_std: list[float]):
    X = np.load(data_dir / "x.npy")
    y = np.load(data_dir / "y.npy")
    idx = np.asarray(rows)
    return (X[idx] - np.asarray(mean)) * np.asarray(inv_std), y[idx]


def relative(a: np.ndarray, b: np.ndarray) -> float:
    return float(np.linalg.norm(a - b) / np.linalg.norm(b))


# ---------------------------------------------------------------- gradients

@pytest.mark.parametrize("case", GRADIENT_CASES)
@pytest.mark.parametrize("P", RANKS)
def test_reduced_gradient_equals_serial_full_batch_gradient(runs, data_dir, case, P):
    r = runs[P][case]
    n_layers = len(r["params"]) // 2
    X, y = standardised(data_dir, r["rows"], r["mean"], r["inv_std"])
    expected = reference_gradient(tensors(r["params"], n_layers), X, y, ACTIVATION[case])  # autograd
    got = tensors(r["grads"], n_layers)
    diff = relative(np.concatenate([g.ravel() for g in got]), np.concatenate([e.ravel() for e in expected]))
    # Summation order is the only difference between the two: float64 agreement far below 1e-12.  # autograd
    assert diff < 1e-12, f"{case} at P={P}: relative gradient difference {diff:.3e}"


def test_gradient_batches_and_standardisation_do_not_depend_on_P(runs, data_dir):
    X = np.load(data_dir / "x.npy")
    for case in GRADIENT_CASES:
        first = runs[1][case]
        train = X[np.asarray(first["train_rows"])]
        # z-scores over the training rows (population standard deviation). common practice
        assert np.allclose(first["mean"], train.mean(axis=0), rtol=1e-12, atol=1e-14)
        assert np.allclose(first["inv_std"], 1.0 / train.std(axis=0), rtol=1e-12, atol=0)
        for P in RANKS[1:]:
            assert runs[P][case]["rows"] == first["rows"]  # the sampler ignores P (DEVELOPERS.md, the step)
            assert runs[P][case]["mean"] == first["mean"]  # exact statistics: bit-identical for every P
            assert runs[P][case]["inv_std"] == first["inv_std"]


# ---------------------------------------------------------------- trajectories

def reference_adam(r: dict, data_dir: Path, activation: str, steps: int) -> np.ndarray:
    """K Adam steps on the recorded global batches, from Kingma & Ba 2015, Algorithm 1 (constant step size)."""
    n_layers = len(r["params0"]) // 2
    theta = tensors(r["params0"], n_layers)
    m = [np.zeros_like(t) for t in theta]
    v = [np.zeros_like(t) for t in theta]
    a, b1, b2, eps = ADAM["learning_rate"], ADAM["beta1"], ADAM["beta2"], ADAM["eps"]
    for t in range(1, steps + 1):
        X, y = standardised(data_dir, r["batches"][t - 1], r["mean"], r["inv_std"])
        g = reference_gradient(theta, X, y, activation)
        for i in range(len(theta)):
            m[i] = b1 * m[i] + (1 - b1) * g[i]
            v[i] = b2 * v[i] + (1 - b2) * g[i] ** 2
            m_hat = m[i] / (1 - b1**t)
            v_hat = v[i] / (1 - b2**t)
            theta[i] = theta[i] - a * m_hat / (np.sqrt(v_hat) + eps)
    names = [f"{k}{l}" for l in range(n_layers) for k in ("W", "b")]
    return flat(dict(zip(names, theta, strict=True)))


@pytest.mark.parametrize("case", ["train_fast", "train_exact"])
def test_serial_training_matches_independent_adam(runs, data_dir, case):
    r = runs[1][case]
    expected = reference_adam(r, data_dir, "tanh", STEPS)  # Kingma & Ba 2015, Algorithm 1 + autograd
    assert relative(flat(r["params"]), expected) < 1e-10


@pytest.mark.parametrize("P", [2, 3, 4])
def test_fast_mode_weights_after_k_steps_match_serial(runs, P):
    serial, parallel = runs[1]["train_fast"], runs[P]["train_fast"]
    assert parallel["batches"] == serial["batches"]  # same global batches for every P (DEVELOPERS.md, the step)
    assert parallel["params0"] == serial["params0"]
    # Only the summation order of the allreduce differs (Higham 2002, §4.2): far below 1e-10 after 5 steps.
    assert relative(flat(parallel["params"]), flat(serial["params"])) < 1e-10


def test_exact_mode_weights_are_bit_identical_for_every_P(runs):
    digests = {P: runs[P]["train_exact"]["sha256_by_rank"][0] for P in RANKS}
    # Order-independent exact accumulation (README, fast and exact reduction): one SHA-256 for P = 1, 2, 3, 4.
    assert len(set(digests.values())) == 1, digests
    serial = np.asarray(flat(runs[1]["train_exact"]["params"]))
    assert np.array_equal(flat(runs[4]["train_exact"]["params"]), serial)
    # the digest is the SHA-256 of the flat float64 params, last layer first, W before b (DEVELOPERS.md, the step)
    named = runs[1]["train_exact"]["params"]
    layout = [np.asarray(named[f"{k}{l}"], dtype=np.float64).ravel() for l in reversed(range(len(named) // 2))
              for k in ("W", "b")]
    assert hashlib.sha256(np.concatenate(layout).tobytes()).hexdigest() == digests[1]


@pytest.mark.parametrize("case", ["train_fast", "train_fast_no_overlap", "train_exact", "wide_fast_sharded",
                                  "wide_exact_sharded", "train_exact_sharded", "wide_exact_compact_sharded"])
@pytest.mark.parametrize("P", RANKS)
def test_parameters_identical_on_every_rank(runs, case, P):
    digests = runs[P][case]["sha256_by_rank"]
    assert len(digests) == P
    assert len(set(digests)) == 1, digests  # DEVELOPERS.md, the step: same update everywhere


@pytest.mark.parametrize("P", [2, 3, 4])
def test_overlap_on_and_off_agree(runs, P):
    on, off = runs[P]["train_fast"], runs[P]["train_fast_no_overlap"]
    assert relative(flat(off["params"]), flat(on["params"])) < 1e-12  # same sums, messageed or whole. common practice


# ---------------------------------------------------------------- sharded update

@pytest.mark.parametrize("P", RANKS)
def test_sharded_fast_update_matches_serial_replicated(runs, P):
    serial, sharded = runs[1]["wide_fast_replicated"], runs[P]["wide_fast_sharded"]
    assert sharded["batches"] == serial["batches"] and sharded["params0"] == serial["params0"]
    # Reduce-scatter + slice update + allgather against one serial sum: only the summation order of the gradient
    # and of the clip norm differ (Higham 2002, §4.2), far below 1e-10 after 5 clipped Adam steps.
    assert relative(flat(sharded["params"]), flat(serial["params"])) < 1e-10
    blocking = runs[P]["wide_fast_sharded_no_overlap"]
    assert relative(flat(blocking["params"]), flat(sharded["params"])) < 1e-12  # same sums, messageed or whole


@pytest.mark.parametrize("P", RANKS)
def test_a_rank_that_owns_everything_or_nothing_keeps_step_with_the_others(runs, P):
    # Reaching here at all means no rank hung; then the usual agreements hold (Higham 2002, §4.2 for fast mode).
    serial = runs[1]["tiny_fast_replicated"]
    assert relative(flat(runs[P]["tiny_fast_sharded"]["params"]), flat(serial["params"])) < 1e-10
    digests = {runs[Q][case]["sha256_by_rank"][0] for Q in (1, P) for case in ("tiny_exact_replicated",
                                                                               "tiny_exact_sharded")}
    assert len(digests) == 1, digests  # exact mode: one SHA-256 whatever the owner of each slice
    for case in ("tiny_fast_sharded", "tiny_exact_sharded"):
        assert len(set(runs[P][case]["sha256_by_rank"])) == 1, case


def test_sharded_exact_update_is_bit_identical_to_replicated_for_every_P(runs):
    # Exact sums, an elementwise update and a clip norm from fixed blocks summed with math.fsum (correctly
    # rounded, so order-free): the update's owner changes nothing (README, fast and exact reduction).
    pairs = (("wide_exact_replicated", "wide_exact_sharded"), ("train_exact", "train_exact_sharded"))
    for replicated, sharded in pairs:
        digests = {runs[P][case]["sha256_by_rank"][0] for P in RANKS for case in (replicated, sharded)}
        assert len(digests) == 1, (replicated, digests)


def test_compact_exact_format_is_bit_identical_for_every_P_and_close_to_the_wide_one(runs):
    # One int64 per value on per-message scales fixed from a MAX (order-free): integer sums again, so one SHA-256
    # for P = 1…4 and either update (README, fast and exact reduction).
    for cases in (("train_exact_compact",), ("wide_exact_compact_replicated", "wide_exact_compact_sharded")):
        digests = {runs[P][case]["sha256_by_rank"][0] for P in RANKS for case in cases}
        assert len(digests) == 1, (cases, digests)
    # Another grid than the wide format's, so other bits, but float64 terms rounded at 2^-(51-h) relative to each
    # message's largest value: after 5 Adam steps the two runs differ far below 1e-8 (kernels/compactsum.py bound).
    compact, wide = flat(runs[2]["train_exact_compact"]["params"]), flat(runs[2]["train_exact"]["params"])
    assert 0.0 < relative(compact, wide) < 1e-8


def test_narrow_exact_format_is_bit_identical_for_every_P_and_close_to_the_wide_one(runs):
    # int32 sums on a 30-bit grid per message: integer sums again, so one SHA-256 for P = 1…4.
    for case in ("train_exact_narrow", "wide_exact_narrow_sharded"):
        digests = {runs[P][case]["sha256_by_rank"][0] for P in RANKS}
        assert len(digests) == 1, (case, digests)
    # Each term rounds at 2^-(30-h) of its message's largest value (kernels/compactsum.py): after 5 Adam steps
    # the run stays within 1e-4 of the correctly rounded wide format's, but not on the same bits.
    narrow, wide = flat(runs[2]["train_exact_narrow"]["params"]), flat(runs[2]["train_exact"]["params"])
    assert 0.0 < relative(narrow, wide) < 1e-4


@pytest.mark.parametrize("P", RANKS)
def test_a_communication_thread_gives_the_same_sums(runs, P):
    # The thread runs the same collectives on a duplicated communicator: the same sums, message by message.
    for thread, library in (("train_fast_thread", "train_fast"), ("wide_fast_sharded_thread", "wide_fast_sharded")):
        assert relative(flat(runs[P][thread]["params"]), flat(runs[P][library]["params"])) < 1e-12  # common practice
        assert len(set(runs[P][thread]["sha256_by_rank"])) == 1


# ---------------------------------------------------------------- command line at P = 2

CLI_G = 12


@pytest.fixture(scope="module")
def cli_runs(tmp_path_factory) -> dict[str, Path]:
    """The same exact-mode job run three ways: one process, ``--ranks 2``, and ``mpiexec -n 2 -m shardmill``."""
    root = tmp_path_factory.mktemp("cli")
    x, y = make_classification(root / "data", rows=ROWS, features=6, classes=3, seed=5)
    folders = {}
    for name in ("serial", "ranks", "mpiexec"):
        folder = root / name
        folder.mkdir()
        write_job(folder, model={"layers": [6, 8, 3], "activation": "tanh", "dtype": "float64"},
                  data={"inputs": str(x), "targets": str(y), "validation_fraction": VALIDATION},
                  optimizer=ADAM,
                  run={"epochs": 2, "global_batch": CLI_G, "seed": 2, "reduction": "exact", "exact_chunk": 3,
                       "check_every": 1, "workdir": "run"})
        folders[name] = folder
    procs = {
        "serial": run_cli(["train", str(folders["serial"] / "job.toml"), "--no-progress"], timeout=120),
        "ranks": run_cli(["train", str(folders["ranks"] / "job.toml"), "--ranks", "2", "--no-progress"],
                         timeout=120),
        "mpiexec": run_mpi(2, ["-m", "shardmill", "train", str(folders["mpiexec"] / "job.toml"), "--no-progress"],
                           timeout=120),
    }
    for name, proc in procs.items():
        assert proc.returncode == 0, f"{name}: {proc.stderr[-3000:]}"
    return folders


def read_metrics(folder: Path) -> list[dict]:
    lines = (folder / "run" / "metrics.jsonl").read_text().splitlines()
    return [r for r in map(json.loads, lines) if r.get("kind", "epoch") == "epoch"]  # epoch records only


@pytest.mark.parametrize("name", ["ranks", "mpiexec"])
def test_two_process_cli_runs_write_final_and_record_two_processes(cli_runs, name):
    assert (cli_runs[name] / "run" / "final.npz").is_file()
    records = read_metrics(cli_runs[name])
    assert [r["epoch"] for r in records] == [1, 2]
    assert all(r["processes"] == 2 for r in records)


def test_cli_runs_agree_bit_for_bit_with_one_process(cli_runs):
    arrays = {}
    for name, folder in cli_runs.items():
        with np.load(folder / "run" / "final.npz", allow_pickle=False) as f:
            arrays[name] = {k: f[k] for k in f.files if k.startswith(("W", "b"))}
    assert sorted(arrays["serial"]) == ["W0", "W1", "b0", "b1"]
    for name in ("ranks", "mpiexec"):
        for key, value in arrays["serial"].items():
            # exact reduction (README, fast and exact reduction); check_every = 1 also passed on every step of this run
            assert np.array_equal(arrays[name][key], value), (name, key)


def test_metrics_of_a_two_process_run(cli_runs):
    records = read_metrics(cli_runs["ranks"])
    steps_per_epoch = int(ROWS * (1 - VALIDATION)) // CLI_G
    previous_step = 0
    for record in records:
        assert record["processes"] == 2 and record["global_batch"] == CLI_G
        steps = record["step"] - previous_step
        previous_step = record["step"]
        assert steps == steps_per_epoch
        # throughput is samples over the slowest rank's wall time of the epoch. common practice
        assert record["samples_per_s"] == pytest.approx(steps * CLI_G / record["seconds"], rel=1e-9)
        high, mean = record["phase_seconds_max"], record["phase_seconds_mean"]
        assert set(high) == set(mean) == {"data", "forward", "backward", "exchange", "update"}
        for phase in high:
            assert 0.0 <= mean[phase] <= high[phase] + 1e-15  # a max over ranks bounds their mean. common practice
        assert sum(mean.values()) <= record["seconds"] * 1.01 + 1e-3  # phases are parts of the epoch
