"""The house rules of the package, read from its source: rooms without circles, modules that fit a reader, one
description per loss and activation, one door to the MPI world (DEVELOPERS.md, "Layout" and "Conventions").

These are checks of our own conventions, not of outside facts: each says which convention it guards.
"""

from __future__ import annotations

import ast
import json
from pathlib import Path

import pytest

ROOT = Path(__file__).resolve().parents[1]
FOLDERS = {"shardmill": ROOT / "runtime", "shardmill.kernels": ROOT / "kernels"}


def modules() -> dict[str, Path]:
    """Every module of the package by its dotted name (``shardmill.training.trainer``), packages included."""
    found: dict[str, Path] = {}
    for prefix, folder in FOLDERS.items():
        for path in sorted(folder.rglob("*.py")):
            parts = list(path.relative_to(folder).with_suffix("").parts)
            if prefix == "shardmill" and parts and parts[0] == "kernels":
                continue
            if parts[-1] == "__init__":
                parts = parts[:-1]
            found[".".join([prefix, *parts])] = path
    return found


MODULES = modules()


def imports_of(path: Path) -> list[tuple[str, int]]:
    """(imported module, line) for every import of the file, at the top and inside functions alike."""
    names: list[tuple[str, int]] = []
    for node in ast.walk(ast.parse(path.read_text())):
        if isinstance(node, ast.Import):
            names += [(alias.name, node.lineno) for alias in node.names]
        elif isinstance(node, ast.ImportFrom) and node.module and node.level == 0:
            for alias in node.names:  # `from shardmill.data import tables` imports a module
                full = f"{node.module}.{alias.name}"
                names.append((full if full in MODULES else node.module, node.lineno))
    return names


def graph() -> dict[str, set[str]]:
    edges: dict[str, set[str]] = {}
    for name, path in MODULES.items():
        edges[name] = {target for target, _ in imports_of(path) if target in MODULES and target != name}
    return edges


def test_the_import_graph_has_no_circle() -> None:
    # convention: rooms import downward only (DEVELOPERS.md "Layout"); a circle is found by depth-first search
    edges = graph()
    state: dict[str, int] = {}
    stack: list[str] = []
    circles: list[list[str]] = []

    def visit(node: str) -> None:
        state[node] = 1
        stack.append(node)
        for target in sorted(edges[node]):
            if state.get(target) == 1:
                circles.append(stack[stack.index(target):] + [target])
            elif target not in state:
                visit(target)
        stack.pop()
        state[node] = 2

    for node in sorted(edges):
        if node not in state:
            visit(node)
    assert circles == []


def test_no_module_imports_the_package_init() -> None:
    # convention: the package's __init__ is the public front door for users, never a dependency inside
    offenders = [f"{name}:{line}" for name, path in MODULES.items() if name != "shardmill"
                 for target, line in imports_of(path) if target == "shardmill"]
    assert offenders == []


def test_modules_fit_a_reader() -> None:
    # convention: no module over 650 lines; the trainer (the step, the gradient, evaluation) under 350
    lengths = {name: len(path.read_text().splitlines()) for name, path in MODULES.items()}
    assert {name: n for name, n in lengths.items() if n > 650} == {}
    assert lengths["shardmill.training.trainer"] < 350


def test_only_the_comm_module_touches_the_mpi_world() -> None:
    # convention: parallel/comm.py is the one door to MPI.COMM_WORLD (DEVELOPERS.md "Conventions")
    touching = sorted(name for name, path in MODULES.items() if "COMM_WORLD" in _code_of(path))
    assert touching == ["shardmill.parallel.comm"]
    # and only it imports mpi4py, besides the raw-MPI timings that price MPI without our wrapper on purpose
    importing = sorted(name for name, path in MODULES.items()
                       if any(target.split(".")[0] == "mpi4py" for target, _ in imports_of(path)))
    assert importing == ["shardmill.parallel.comm", "shardmill.scaling.measure"]


def _code_of(path: Path) -> str:
    """The file's code without docstrings and comments (names in prose do not count)."""
    tree = ast.parse(path.read_text())
    for node in ast.walk(tree):
        body = getattr(node, "body", None)
        if isinstance(body, list) and body and isinstance(body[0], ast.Expr) \
                and isinstance(body[0].value, ast.Constant) and isinstance(body[0].value.value, str):
            body[0].value.value = ""
    return ast.unparse(tree)


def test_step_reads_sample_gradient_clip_update() -> None:
    # convention: Trainer.step fits on one screen and holds no mode branch and no diagnostics (DEVELOPERS.md "The step")
    tree = ast.parse(MODULES["shardmill.training.trainer"].read_text())
    trainer = next(n for n in tree.body if isinstance(n, ast.ClassDef) and n.name == "Trainer")
    step = next(n for n in trainer.body if isinstance(n, ast.FunctionDef) and n.name == "step")
    assert step.end_lineno - step.lineno + 1 <= 40
    assert not any(isinstance(n, (ast.If, ast.IfExp)) for n in ast.walk(step))
    text = ast.unparse(step)
    for word in ("health", "diagnose", "all_equal", "reduction", "exact", "sharded"):
        assert word not in text


@pytest.mark.parametrize("kind", ["loss", "activation"])
def test_no_loss_or_activation_name_is_compared_outside_its_table(kind: str) -> None:
    # convention: one description per loss and activation (DEVELOPERS.md "One description per concept"); only the
    # tables, the kernels' dispatch and the schema's allowed values hold the names as text
    from shardmill.model import activations, losses

    names = set(losses.LOSSES) if kind == "loss" else set(activations.ACTIVATIONS) | {"softmax"}
    allowed = {"shardmill.model.losses", "shardmill.model.activations", "shardmill.kernels.losses",
               "shardmill.kernels.activations", "shardmill.config"}
    found = []
    for name, path in MODULES.items():
        if name in allowed:
            continue
        for node in ast.walk(ast.parse(path.read_text())):
            if isinstance(node, ast.Compare):
                for part in [node.left, *node.comparators]:
                    values = part.elts if isinstance(part, (ast.Tuple, ast.List, ast.Set)) else [part]
                    found += [f"{name}:{node.lineno} {v.value!r}" for v in values
                              if isinstance(v, ast.Constant) and v.value in names]
            elif isinstance(node, ast.Dict):
                found += [f"{name}:{node.lineno} {k.value!r}" for k in node.keys
                          if isinstance(k, ast.Constant) and k.value in names]
    assert found == []


LEAN_PROBE = """\
import json, sys
sys.argv = ["shardmill", "train", "job.toml"]
from shardmill.commands.cli import main
try:
    main()
finally:
    print(json.dumps(sorted({name.split(".")[0] for name in sys.modules})))
"""


def test_a_training_rank_imports_no_plotting_table_or_export_library(tmp_path: Path) -> None:
    """Issue 17's lean ranks: `shardmill train` on a CSV job with categories, layer norm and dropout loads none
    of the plotting, table-format or export libraries (they load where a command needs them: curves, parquet,
    export). SciPy is allowed: Numba imports it itself when it loads (numba/__init__.py, _ensure_critical_deps)."""
    import subprocess
    import sys

    import numpy as np

    rng = np.random.default_rng(0)
    lines = ["a,b,site,label"] + [f"{x:.4f},{y:.4f},{'north' if x > 0 else 'south'},{int(x + y > 0)}"
                                  for x, y in rng.normal(size=(64, 2))]
    (tmp_path / "rows.csv").write_text("\n".join(lines) + "\n")
    (tmp_path / "job.toml").write_text(
        '[model]\nlayers = [3, 8, 2]\nnorm = "layer"\ndropout = 0.1\n'
        '[data]\ninputs = "rows.csv"\ntarget = "label"\ncategorical = ["site"]\n'
        '[run]\nepochs = 1\nglobal_batch = 16\nworkdir = "run"\n')
    done = subprocess.run([sys.executable, "-c", LEAN_PROBE], cwd=tmp_path, capture_output=True, text=True,
                          timeout=240)
    assert done.returncode == 0, done.stderr[-2000:]
    loaded = set(json.loads(done.stdout.strip().splitlines()[-1]))
    assert "shardmill" in loaded and "numba" in loaded  # the probe saw a real training process
    heavy = {"matplotlib", "onnx", "onnxruntime", "pyarrow", "pandas", "polars", "plotnine", "sklearn", "PIL"}
    assert loaded & heavy == set()
