"""``shardmill verify``: the parallel gradient agrees with the serial one within Higham's bound, and a wrong
reduction is caught.

Runs under real mpiexec at P = 2, 3, 4. ``mpi_scripts/verify_cases.py`` makes, per P, the full cross product
float32/float64 × fast/exact through ``shardmill.training.verify.verify`` (honest, one rank's share dropped, one element
perturbed); four ``shardmill verify`` command lines cover every P, dtype and mode of the CLI once. The bound
itself is checked against Higham's formula, and the serial reference against autograd.
"""

from __future__ import annotations

import json
import math
from fractions import Fraction
from pathlib import Path

import autograd.numpy as anp
import numpy as np
import pytest
from autograd import grad
from helpers import make_classification, run_mpi, write_job
from shardmill.config import job_from_dict
from shardmill.training.trainer import Trainer
from shardmill.training.verify import gamma, serial_gradient

pytestmark = pytest.mark.mpi

SCRIPTS = Path(__file__).parent / "mpi_scripts"
LAYERS = [6, 16, 8, 3]
NAMES = ["W0", "b0", "W1", "b1", "W2", "b2"]
G, CHUNK = 48, 12
MODES = ("fast", "exact", "compact", "narrow")  # compact and narrow: exact mode's other formats
CASES = {f"{dtype}_{mode}": (dtype, mode) for dtype in ("float32", "float64") for mode in MODES}
CASES.update({"float64_fast-sharded": ("float64", "fast-sharded"),
              "float32_exact-sharded": ("float32", "exact-sharded")})
UNIT_ROUNDOFF = {"float32": Fraction(1, 2**24), "float64": Fraction(1, 2**53)}  # IEEE 754 binary32 / binary64


def job_tables(data: Path, dtype: str, mode: str) -> dict:
    """A job for ``mode``: fast, exact, compact or narrow, with ``-sharded`` for a sharded update."""
    reduction, _, sharded = mode.partition("-")
    return {"model": {"layers": LAYERS, "activation": "relu", "loss": "softmax_cross_entropy", "dtype": dtype},
            "data": {"inputs": str(data / "x.npy"), "targets": str(data / "y.npy"), "validation_fraction": 0.2},
            "optimizer": {"method": "sgd", "learning_rate": 0.05},
            "run": {"global_batch": G, "seed": 1, "reduction": "fast" if reduction == "fast" else "exact",
                    "exact_format": "wide" if reduction in ("fast", "exact") else reduction, "exact_chunk": CHUNK,
                    "update": "sharded" if sharded else "replicated", "workdir": str(data / f"run-{dtype}-{mode}")}}


@pytest.fixture(scope="module")
def data_dir(tmp_path_factory) -> Path:
    path = tmp_path_factory.mktemp("verify")
    make_classification(path, rows=240, features=6, classes=3, seed=5)
    return path


@pytest.fixture(scope="module")
def api_runs(data_dir: Path) -> dict[int, dict]:
    """{P: verify_cases.py output}: plain, dropped-share and perturbed reports for the four cases."""
    cases = [{"name": name, "job": job_tables(data_dir, dtype, mode), "trajectory": 0 if mode.startswith("fast") else 2}
             for name, (dtype, mode) in CASES.items()]
    spec = data_dir / "verify-spec.json"
    spec.write_text(json.dumps({"base": str(data_dir), "cases": cases}))
    out = {}
    for P in (2, 3, 4):
        result = data_dir / f"verify-{P}.json"
        proc = run_mpi(P, [str(SCRIPTS / "verify_cases.py"), str(spec), str(result)], timeout=180)
        assert proc.returncode == 0, proc.stderr[-3000:]
        out[P] = json.loads(result.read_text())
        assert out[P]["processes"] == P
    return out


# CLI runs: every P, dtype and mode at least once; the last one also follows a 3-step trajectory.
CLI_RUNS = {"p2_float32_fast": (2, "float32", "fast", 0), "p3_float64_exact": (3, "float64", "exact", 0),
            "p4_float32_exact": (4, "float32", "exact", 0), "p3_float64_fast_traj": (3, "float64", "fast", 3)}


@pytest.fixture(scope="module")
def cli_runs(data_dir: Path) -> dict[str, tuple]:
    """{name: (completed process, parsed JSON report)} of ``shardmill verify JOB --json OUT``."""
    out = {}
    for name, (P, dtype, mode, trajectory) in CLI_RUNS.items():
        folder = data_dir / name
        folder.mkdir()
        tables = job_tables(data_dir, dtype, mode)
        job = write_job(folder, tables["model"], tables["run"], tables["optimizer"], tables["data"])
        report = folder / "report.json"
        args = ["-m", "shardmill", "verify", str(job), "--out", str(report)]
        if trajectory:
            args += ["--trajectory", str(trajectory)]
        proc = run_mpi(P, args, timeout=120)
        out[name] = (proc, json.loads(report.read_text()) if report.exists() else None)
    return out


def tensor_rows(report: dict) -> list[dict]:
    return [t for b in report["batches"] for t in b["tensors"]]


# ---------------------------------------------------------------- the bound


@pytest.mark.parametrize("dtype", ["float32", "float64"])
@pytest.mark.parametrize("k", [1, 2, 47, 1023, 10**6])
def test_gamma_matches_higham(dtype: str, k: int) -> None:
    u = UNIT_ROUNDOFF[dtype]
    expected = k * u / (1 - k * u)  # Higham 2002, Lemma 3.1: γ_k = k·u / (1 − k·u), exact in rationals
    assert math.isclose(gamma(k, np.dtype(dtype)), float(expected), rel_tol=1e-14)


def _autograd_gradient(params: dict[str, np.ndarray], X: np.ndarray, y: np.ndarray) -> dict[str, np.ndarray]:
    """Mean softmax cross-entropy of a relu MLP, differentiated by autograd (float64)."""
    L = len(params) // 2

    def loss(flat_list):
        A = X
        for l in range(L):
            Z = anp.dot(A, flat_list[2 * l]) + flat_list[2 * l + 1]
            A = anp.maximum(Z, 0.0) if l < L - 1 else Z
        shifted = A - anp.max(A, axis=1, keepdims=True)
        log_p = shifted - anp.log(anp.sum(anp.exp(shifted), axis=1, keepdims=True))
        return -anp.mean(log_p[np.arange(y.size), y])

    grads = grad(loss)([params[n].astype(np.float64) for n in NAMES])
    return dict(zip(NAMES, grads, strict=True))


@pytest.mark.parametrize("dtype", ["float32", "float64"])
@pytest.mark.parametrize("mode", ["fast", "exact"])
def test_serial_reference_matches_autograd(data_dir: Path, dtype: str, mode: str) -> None:
    job = job_from_dict(job_tables(data_dir, dtype, mode))
    trainer = Trainer(job)
    rows = trainer.sampler.batch(0, 1)
    serial, abs_sums = serial_gradient(trainer, rows)
    X = (np.asarray(trainer.data.X[rows], dtype=np.float64) - trainer.data.mean) * trainer.data.inv_std
    params = trainer.model.named(trainer.model.params)
    expected = _autograd_gradient(params, X.astype(dtype).astype(np.float64), trainer.data.targets[rows])
    got, sums = trainer.model.named(serial), trainer.model.named(abs_sums)
    for name in NAMES:
        g, a = got[name].astype(np.float64), sums[name]
        # Triangle inequality: |Σ x_i| ≤ Σ |x_i| (up to the rounding of the sums themselves).
        assert np.all(np.abs(g) <= a * (1 + 1e-5) + 1e-30), name
        # autograd package: reverse-mode derivative of the same mean loss in float64. float32 keeps about
        # 1e-5 of each term's size through forward, loss and backward (common practice); float64 about 1e-12.
        tolerance = 1e-4 if dtype == "float32" else 1e-11
        np.testing.assert_allclose(g, expected[name], rtol=0, atol=tolerance * (a.max() + 1e-12), err_msg=name)


# ---------------------------------------------------------------- agreement and disagreement (API, all combos)


@pytest.mark.parametrize("P", [2, 3, 4])
@pytest.mark.parametrize("case", list(CASES))
def test_honest_reduction_agrees(api_runs: dict, P: int, case: str) -> None:
    report = api_runs[P]["cases"][case]["plain"]
    dtype, mode = CASES[case]
    reduction = "fast" if mode.startswith("fast") else "exact"  # compact and narrow are exact mode's formats
    assert report["processes"] == P and report["dtype"] == dtype and report["reduction"] == reduction
    assert len(report["batches"]) == 3
    for batch in report["batches"]:
        assert [t["tensor"] for t in batch["tensors"]] == NAMES
    ratios = [t["bound_ratio"] for t in tensor_rows(report)]
    # Higham 2002, §4.2: both sums obey |ŝ − s| ≤ γ_{G−1} Σ|x_i|, so their difference is ≤ 2·γ_{G−1}·Σ|x_i|.
    assert all(0.0 <= r <= 1.0 for r in ratios), ratios
    assert report["verdict"] == "agree" and report["max_bound_ratio"] == max(ratios)
    if not mode.startswith("fast"):
        # Exact mode is independent of P, so the serial trainer follows the same trajectory bit for bit.
        assert [t["step"] for t in report["trajectory"]] == [1, 2]
        assert all(t["max_abs_diff"] == 0.0 for t in report["trajectory"])


@pytest.mark.parametrize("P", [2, 3, 4])
@pytest.mark.parametrize("case", list(CASES))
def test_dropped_share_disagrees(api_runs: dict, P: int, case: str) -> None:
    drop = api_runs[P]["cases"][case]["drop"]
    report = drop["report"]
    assert report["verdict"] == "disagree" and report["max_bound_ratio"] > 1.0
    # The reported difference is the missing share itself, recomputed independently in the script by
    # MLP.loss_and_grad on rank 1's rows; the honest part agrees to within Higham's bound, far below 1e-3.
    # (The narrow format's own grid, 2^-(30-h) of a message's largest value, is float32-sized too.)
    rtol = 1e-3 if CASES[case][0] == "float32" or CASES[case][1] == "narrow" else 1e-9
    for name in NAMES:
        reported = max(t["max_abs_diff"] for t in tensor_rows(report) if t["tensor"] == name)
        assert math.isclose(reported, drop["largest_share"][name], rel_tol=rtol, abs_tol=1e-12), name
    assert max(t["bound_ratio"] for t in tensor_rows(report)) > 100


@pytest.mark.parametrize("P", [2, 3, 4])
@pytest.mark.parametrize("case", list(CASES))
def test_perturbed_element_disagrees_in_its_tensor_only(api_runs: dict, P: int, case: str) -> None:
    perturb = api_runs[P]["cases"][case]["perturb"]
    report = perturb["report"]
    assert report["verdict"] == "disagree" and report["max_bound_ratio"] > 1.0
    rows = {t["tensor"]: t for t in tensor_rows(report)}
    hit = rows[perturb["tensor"]]
    assert hit["bound_ratio"] > 1.0
    # The injected |Δ| dominates the rounding difference (≤ bound), so the reported max |Δ| is |Δ| itself.
    assert math.isclose(hit["max_abs_diff"], perturb["delta"], rel_tol=1e-2)
    for name, row in rows.items():
        if name != perturb["tensor"]:
            assert row["bound_ratio"] <= 1.0, name


# ---------------------------------------------------------------- the command line


@pytest.mark.parametrize("name", list(CLI_RUNS))
def test_cli_verify_agrees(cli_runs: dict, name: str) -> None:
    proc, report = cli_runs[name]
    P, dtype, mode, _ = CLI_RUNS[name]
    assert proc.returncode == 0, proc.stderr[-3000:]
    assert "verdict: AGREE" in proc.stdout
    assert report is not None
    assert (report["processes"], report["dtype"], report["reduction"], report["global_batch"]) == (P, dtype, mode, G)
    assert len(report["batches"]) == 3
    for batch in report["batches"]:
        assert [t["tensor"] for t in batch["tensors"]] == NAMES
        for t in batch["tensors"]:
            assert set(t) == {"tensor", "max_abs_diff", "max_rel_diff", "bound_ratio"}
            assert math.isfinite(t["max_abs_diff"]) and 0.0 <= t["bound_ratio"] <= 1.0  # Higham 2002, §4.2
    assert report["verdict"] == "agree"


def test_cli_trajectory_reports_small_divergence(cli_runs: dict) -> None:
    proc, report = cli_runs["p3_float64_fast_traj"]
    assert proc.returncode == 0, proc.stderr[-3000:]
    trajectory = report["trajectory"]
    assert [t["step"] for t in trajectory] == [1, 2, 3]
    assert sum("trajectory step" in line for line in proc.stdout.splitlines()) == 3
    for t in trajectory:
        assert all(math.isfinite(t[k]) for k in ("max_abs_diff", "max_rel_diff", "rms_param"))
        assert t["rms_param"] > 0.1
        # Three SGD steps (lr 0.05) on gradients that differ by a few ulps: the weights stay within a few
        # hundred ulps of their size (float64 ulp 2.2e-16; common practice).
        assert 0.0 <= t["max_abs_diff"] <= 1e-13 * max(1.0, t["rms_param"])


def test_cli_exit_status_tells_disagreement_from_a_crash(monkeypatch, tmp_path: Path) -> None:
    import argparse

    from shardmill.training import verify as verify_module

    tables = job_tables(tmp_path, "float64", "fast")
    job = write_job(tmp_path, tables["model"], tables["run"], tables["optimizer"], tables["data"])
    args = argparse.Namespace(job=job, batches=1, trajectory=0, json=None)
    fake = {"processes": 1, "global_batch": G, "reduction": "fast", "dtype": "float64", "bound": "b",
            "batches": [], "max_bound_ratio": 7.0}
    for verdict, status in (("agree", 0), ("disagree", verify_module.DISAGREE_EXIT)):
        monkeypatch.setattr(verify_module, "verify", lambda *a, verdict=verdict, **k: {**fake, "verdict": verdict})
        assert verify_module.cmd_verify(args) == status
    assert verify_module.DISAGREE_EXIT not in (0, 1, 2)  # 1: a crash (run_guarded), 2: a user error
