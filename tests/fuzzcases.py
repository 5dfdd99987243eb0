"""A generator of bad (and good) inputs for every door of shardmill, and the classification of what each did.

Each case is (group, name, expect, run): ``run()`` does one thing a user can do (build a job, train a tiny job
one step, read a table, load a damaged checkpoint, predict, draw curves); ``expect`` is "refuse" when the input
is wrong on purpose (a refusal is then the only right answer), "either" when the generator cannot know. The outcome
classes: ``ok`` (ran), ``refused`` (a JobError of one readable line), ``unclear`` (a JobError of several lines or
over 1,000 characters), ``traceback`` (any other exception), ``silent_accept`` (ran although it had to refuse).
Seeded: the same count and seed give the same cases. ``tests/test_fuzz.py`` runs 1,000 in CI (seconds); set
``SHARDMILL_FUZZ_CASES`` for a longer local run.
"""

from __future__ import annotations

import hashlib
import json
import math
import os
import shutil
import string
import zipfile
from collections import Counter
from collections.abc import Callable, Iterator
from dataclasses import dataclass
from pathlib import Path

import numpy as np
import shardmill as sm
from shardmill.config import SCHEMA, job_from_dict
from shardmill.errors import JobError

CLASSES = ("ok", "refused", "unclear", "traceback", "silent_accept")


@dataclass
class Case:
    group: str
    name: str
    expect: str  # "refuse" or "either"
    run: Callable[[], object]


def classify(case: Case) -> tuple[str, str]:
    """(class, detail) of one case's outcome."""
    try:
        with np.errstate(all="ignore"):
            case.run()
    except JobError as err:
        text = str(err)
        if "\n" in text or len(text) > 1000:
            return "unclear", text[:300]
        return "refused", text[:200]
    except Exception as err:  # noqa: BLE001 — the class being counted
        return "traceback", f"{type(err).__name__}: {str(err)[:300]}"
    return ("silent_accept", "") if case.expect == "refuse" else ("ok", "")


# --- values -------------------------------------------------------------------------------------------------------

def _value(rng: np.random.Generator) -> object:
    kind = int(rng.integers(0, 14))
    return [
        lambda: int(rng.integers(-5, 5)), lambda: float(rng.normal() * 10.0 ** int(rng.integers(-3, 4))),
        lambda: math.nan, lambda: math.inf, lambda: -math.inf, lambda: 10 ** 400, lambda: True,
        lambda: "".join(rng.choice(list(string.printable), size=int(rng.integers(0, 12)))),
        lambda: "x" * int(rng.integers(1000, 5000)), lambda: [int(v) for v in rng.integers(-2, 40, size=3)],
        lambda: [], lambda: {"a": 1}, lambda: None, lambda: "\x00\ufeff",
    ][kind]()


# --- the groups -----------------------------------------------------------------------------------------------------

def job_keys(rng: np.random.Generator, folder: Path) -> Case:
    """A valid base job with one key set to a random value (the key from the schema, or an unknown one)."""
    key = SCHEMA[int(rng.integers(0, len(SCHEMA)))]
    value = _value(rng)
    raw = {"model": {"layers": [4, 6, 3]}}
    section, name = (key.section, key.name) if rng.random() < 0.9 else ("model", "no_such_key")
    raw.setdefault(section, {})[name] = value
    expect = "refuse" if name == "no_such_key" else "either"
    return Case("job keys", f"{section}.{name}={str(value)[:30]!r}", expect, lambda: job_from_dict(raw, base=folder))


def overrides(rng: np.random.Generator, folder: Path) -> Case:
    job = folder / "base.toml"
    if not job.exists():
        job.write_text('[model]\nlayers = [4, 6, 3]\n')
    key = SCHEMA[int(rng.integers(0, len(SCHEMA)))].path
    text = "".join(rng.choice(list("0123456789.-e[],\"'abc= \t"), size=int(rng.integers(0, 10))))
    forms = [f"{key}={text}", f"{key}", f"={text}", f"{key}.x={text}", f"model.layers={text}"]
    assignment = forms[int(rng.integers(0, len(forms)))]
    expect = "refuse" if assignment.startswith("=") or "=" not in assignment else "either"
    return Case("--set", assignment[:40], expect, lambda: sm.load_job(job, overrides=[assignment]))


def _tiny_job(folder: Path, data: dict, model: dict | None = None, run: dict | None = None) -> sm.Job:
    return job_from_dict({"model": {"layers": [3, 4, 2], **(model or {})},
                          "data": {"validation_fraction": 0.25, **data},
                          "run": {"epochs": 1, "global_batch": 4, "max_steps": 1, "workdir": str(folder / "run"),
                                  **(run or {})}}, base=folder)


def _train(job: sm.Job) -> object:
    return sm.train(job, progress=False, fresh=True)


def data_arrays(rng: np.random.Generator, folder: Path) -> Case:
    """Inputs and targets as .npy files, one damaged (or none)."""
    n = int(rng.integers(4, 30))
    X = rng.normal(size=(n, 3))
    y = rng.integers(0, 2, size=n)
    damage = int(rng.integers(0, 9))
    expect = "refuse"
    if damage == 0:
        X[int(rng.integers(0, n)), int(rng.integers(0, 3))] = [math.nan, math.inf, -math.inf][int(rng.integers(0, 3))]
    elif damage == 1:
        y = y.astype(np.float64)
        y[int(rng.integers(0, n))] = [2.5, -1.0, 1e300, math.nan][int(rng.integers(0, 4))]
    elif damage == 2:
        X = X[:, :2]
    elif damage == 3:
        y = y[: n - 1]
    elif damage == 4:
        X = X.astype(np.complex128)
    elif damage == 5:
        X = X.astype(str)
    elif damage == 6:
        X[0, 0] = 1e308
        X[1, 0] = -1e308
    else:
        expect = "either"  # undamaged, or only scaled
        X *= 10.0 ** int(rng.integers(-30, 30))
    sub = folder / f"arrays-{rng.integers(1 << 30)}"
    sub.mkdir()
    np.save(sub / "x.npy", X)
    np.save(sub / "y.npy", y)
    return Case("data arrays", f"damage {damage}", expect,
                lambda: _train(_tiny_job(sub, {"inputs": "x.npy", "targets": "y.npy"})))


def tables(rng: np.random.Generator, folder: Path) -> Case:
    """A CSV table with a header, one thing wrong (or nothing)."""
    n = int(rng.integers(6, 20))
    header = ["a", "b", "c", "y"]
    rows = [[f"{v:.6g}" for v in rng.normal(size=3)] + [str(int(rng.integers(0, 2)))] for _ in range(n)]
    damage = int(rng.integers(0, 9))
    expect = "refuse"
    prefix = ""
    if damage == 0:
        rows[int(rng.integers(0, n))][1] = "not-a-number"
    elif damage == 1:
        header[1] = "a"  # a repeated name
    elif damage == 2:
        rows[int(rng.integers(0, n))] = rows[0][:2]
    elif damage == 3:
        rows[int(rng.integers(0, n))][0] = "9" * 200_000  # a field over the csv module's default limit
    elif damage == 4:
        prefix = "\ufeff\ufeff"  # a doubled byte-order mark
    elif damage == 5:
        header[2] = "c\x00"
    elif damage == 6:
        rows = []
    elif damage == 7:
        prefix = "\ufeff"  # one byte-order mark: a legitimate file
        expect = "either"
    else:
        expect = "either"
    sub = folder / f"table-{rng.integers(1 << 30)}"
    sub.mkdir()
    text = prefix + "\n".join(",".join(r) for r in [header, *rows]) + "\n"
    (sub / "t.csv").write_text(text, encoding="utf-8")
    return Case("tables", f"damage {damage}", expect, lambda: _train(_tiny_job(sub, {"inputs": "t.csv",
                                                                                     "target": "y"})))


def batch_edges(rng: np.random.Generator, folder: Path) -> Case:
    """Global batches and exact chunks at their edges (1, 2, 3 rows; chunk 1): legitimate, they must train."""
    G = int(rng.integers(1, 4))
    exact = bool(rng.integers(0, 2))
    sub = folder / f"edge-{rng.integers(1 << 30)}"
    sub.mkdir()
    np.save(sub / "x.npy", rng.normal(size=(12, 3)))
    np.save(sub / "y.npy", rng.integers(0, 2, size=12))
    run = {"global_batch": G, "max_steps": 2, **({"reduction": "exact", "exact_chunk": 1} if exact else {})}
    return Case("batch edges", f"G={G} exact={exact}", "either",
                lambda: _train(_tiny_job(sub, {"inputs": "x.npy", "targets": "y.npy"}, run=run)))


def _trained(folder: Path) -> Path:
    """A finished tiny run (trained once per folder), whose workdir the checkpoint and curves cases copy."""
    workdir = folder / "trained" / "run"
    if not (workdir / "final.npz").exists():
        base = folder / "trained"
        base.mkdir(exist_ok=True)
        rng = np.random.default_rng(0)
        np.save(base / "x.npy", rng.normal(size=(40, 3)))
        np.save(base / "y.npy", rng.integers(0, 2, size=40))
        _train(_tiny_job(base, {"inputs": "x.npy", "targets": "y.npy"}, run={"max_steps": 0, "epochs": 2}))
    return workdir


def checkpoints(rng: np.random.Generator, folder: Path) -> Case:
    """A copy of a finished run with one file of its newest checkpoint damaged; then load_model on it."""
    source = _trained(folder)
    sub = folder / f"ckpt-{rng.integers(1 << 30)}"
    shutil.copytree(source, sub)
    newest = sorted((sub / "checkpoints").glob("step-*"))[-1]
    damage = int(rng.integers(0, 6))
    target = newest / ["params.npz", "optimizer.npz", "state.json"][int(rng.integers(0, 3))]
    data = bytearray(target.read_bytes())
    if damage == 0:
        data[int(rng.integers(0, len(data)))] ^= 0xFF
    elif damage == 1:
        data = data[: int(rng.integers(0, len(data)))]
    elif damage == 2:
        data = bytearray(b"not a checkpoint")
    elif damage == 3 and target.suffix == ".json":
        state = json.loads(data)
        state[["step", "optimizer_updates", "files"][int(rng.integers(0, 3))]] = _value(rng)
        data = bytearray(json.dumps(state).encode())
    elif damage == 4:
        target.unlink()
        data = None
    else:
        with zipfile.ZipFile(newest / "params.npz", "a") as archive:  # a member no checkpoint holds
            archive.writestr("extra.npy", b"\x93NUMPY junk")
        data = None
    if data is not None:
        target.write_bytes(bytes(data))
    return Case("checkpoints", f"damage {damage} {target.name}", "refuse", lambda: sm.load_model(newest))


def _sha(path: Path) -> str:
    return hashlib.sha256(path.read_bytes()).hexdigest()


def _recompute_checksums(newest: Path) -> None:
    """What a tool or a person rewriting a checkpoint does: every checksum made to fit the new bytes (the files'
    in state.json, state.json's in the index, the index's own: the formula ``checkpoint.py`` writes)."""
    state = json.loads((newest / "state.json").read_text())
    if isinstance(state.get("files"), dict):
        state["files"] = {name: _sha(newest / name) for name in state["files"] if (newest / name).is_file()}
    (newest / "state.json").write_text(json.dumps(state, indent=1))
    index_path = newest.parent / "index.json"
    index = json.loads(index_path.read_text())
    for entry in index["checkpoints"]:
        if entry["name"] == newest.name:
            entry["state_sha256"] = _sha(newest / "state.json")
    index["sha256"] = hashlib.sha256(json.dumps(index["checkpoints"], sort_keys=True).encode()).hexdigest()
    index_path.write_text(json.dumps(index, indent=1))


def rewritten_checkpoints(rng: np.random.Generator, folder: Path) -> Case:
    """Structural damage to the newest checkpoint with every checksum recomputed to fit: only the structure
    checks can tell (no key configured). Then a resume of the run must refuse it (or fall back to an older,
    undamaged checkpoint, which is not this case's newest: load_model on the folder itself is what is asked)."""
    source = _trained(folder)
    sub = folder / f"rewrite-{rng.integers(1 << 30)}"
    shutil.copytree(source, sub)
    newest = sorted((sub / "checkpoints").glob("step-*"))[-1]
    damage = int(rng.integers(0, 8))
    state = json.loads((newest / "state.json").read_text())
    if damage == 0:
        state["step"] = [-5, "abc", None, 1.5, state["step"] - 1][int(rng.integers(0, 5))]
    elif damage == 1:
        state["optimizer_updates"] = [-1, state["optimizer_updates"] + 5, "x"][int(rng.integers(0, 3))]
    elif damage == 2:
        state["job"]["model"]["activation"] = "tanh"  # the run trained relu (the default)
    elif damage == 3:
        state["files"] = list(state["files"])
    elif damage == 4:
        state["layers"] = [3, 5, 2]
    if damage <= 4:
        (newest / "state.json").write_text(json.dumps(state, indent=1))
    else:
        with np.load(newest / "params.npz", allow_pickle=False) as archive:
            arrays = {k: archive[k] for k in archive.files}
        if damage == 5:
            arrays["W0"] = arrays["W0"].astype(np.complex128)
        elif damage == 6:
            arrays.pop("input_mean")
        else:
            arrays["W0"] = arrays["W0"][:, :-1]
        np.savez(newest / "params.npz", **arrays)
    _recompute_checksums(newest)
    return Case("rewritten checkpoints", f"damage {damage}", "refuse", lambda: sm.load_model(newest))


def curves(rng: np.random.Generator, folder: Path) -> Case:
    """metrics.jsonl with one strange line: curves must draw what it can, or refuse in one line."""
    from shardmill.commands.curves import read_metrics

    source = _trained(folder) / "metrics.jsonl"
    sub = folder / f"curves-{rng.integers(1 << 30)}"
    sub.mkdir()
    lines = source.read_text().splitlines()
    strange = [json.dumps({"kind": "epoch", "epoch": 10 ** 400}), "[" * 100_000, json.dumps({"kind": "epoch"}),
               "{\"kind\": \"epoch\", \"epoch\": NaN}", "\x00" * 50, json.dumps({"kind": "epoch", "epoch": -1,
                                                                               "step": "x", "train": []})]
    lines.insert(int(rng.integers(0, len(lines) + 1)), strange[int(rng.integers(0, len(strange)))])
    (sub / "metrics.jsonl").write_text("\n".join(lines) + "\n")
    return Case("curves", "strange line", "either", lambda: read_metrics(sub))


def predict(rng: np.random.Generator, folder: Path) -> Case:
    """The trained model's predictor on rows of the wrong width, dtype or values."""
    predictor = sm.load_model(_trained(folder) / "final.npz")
    choices = [rng.normal(size=(3, 2)), rng.normal(size=(3,)), np.array([["a", "b", "c"]]),
               np.full((2, 3), math.nan), rng.normal(size=(0, 3)), rng.normal(size=(2, 3)) * 1e300]
    k = int(rng.integers(0, len(choices)))
    return Case("predict", f"rows {k}", "refuse" if k in (0, 1, 2, 3) else "either",
                lambda: predictor.predict(choices[k]))


GROUPS: tuple[Callable[[np.random.Generator, Path], Case], ...] = (
    job_keys, overrides, data_arrays, tables, batch_edges, checkpoints, rewritten_checkpoints, curves, predict)
WEIGHTS = (6, 4, 2, 2, 1, 2, 2, 1, 2)  # the cheap groups more often


def generate(count: int, seed: int, folder: Path) -> Iterator[Case]:
    """``count`` cases drawn from the groups (weighted), seeded."""
    rng = np.random.default_rng(seed)
    p = np.asarray(WEIGHTS, dtype=float) / sum(WEIGHTS)
    for _ in range(count):
        yield GROUPS[int(rng.choice(len(GROUPS), p=p))](rng, folder)


def run(count: int, seed: int, folder: Path) -> dict[str, object]:
    """Generate and classify ``count`` cases; the figures: per class, per group × class, and the failures."""
    os.environ.setdefault("SHARDMILL_NO_PROGRESS", "1")
    totals: Counter[str] = Counter()
    by_group: dict[str, Counter[str]] = {}
    failures = []
    for case in generate(count, seed, folder):
        outcome, detail = classify(case)
        totals[outcome] += 1
        by_group.setdefault(case.group, Counter())[outcome] += 1
        if outcome in ("traceback", "silent_accept", "unclear"):
            failures.append({"group": case.group, "case": case.name, "class": outcome, "detail": detail})
    return {"cases": count, "seed": seed, "classes": {c: totals[c] for c in CLASSES},
            "groups": {g: dict(c) for g, c in sorted(by_group.items())}, "failures": failures}
