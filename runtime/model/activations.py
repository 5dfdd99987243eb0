"""The activation table: one entry per activation, everything the package knows about it in one place.

An entry names the Numba kernel code (``kernels/activations.py`` holds the forward and backward rules), whether it
is of the ReLU family (``model.init = "auto"`` picks He initialisation then), what the health diagnostics watch for
(saturation, dead units), a numpy reference of f(z) in float64, its ONNX form and its formula for the docs and the
model card. :data:`ACTIVATIONS` holds the hidden-layer activations (the job's ``model.activation``; any of them may
also be the ``model.output`` of a loss that lets the job choose); :data:`OUTPUTS` adds softmax and exp, which only a
loss implies.

Adding an activation: its forward and backward rule in ``kernels/activations.py`` (a new code), then one entry here.
The rest of the package (model, health, export, predict, bench, the docs) reads the entry.
"""

from __future__ import annotations

from collections.abc import Callable
from dataclasses import dataclass
from typing import Any

import numpy as np
from shardmill.kernels import activations as kernels

Builder = Any
"""The ONNX graph builder of ``commands/export.py``: ``op(type, *inputs, scope=)``, ``scalar(value)`` (a 0-d constant
in the model's dtype) and ``reduce(type, x, scope)`` (over axis 1, kept), each returning a tensor name."""


@dataclass(frozen=True)
class Activation:
    """One activation f, applied elementwise (softmax: per row) to a layer's pre-activations z.

    name: the job file's name. code: the kernel code in ``kernels/activations.py``, None for the outputs only a loss
    implies (softmax, per row, and exp: their kernels are in ``kernels/losses.py``, applied by the loss).
    relu_family: He initialisation suits it (``model.init = "auto"``). watch_saturation: the health diagnostics
    report the fraction of units with |z| > 4, where f' nearly vanishes; watch_dead: they report the fraction of
    units zero on every row. unbounded: f's range is all of ℝ, so an output layer with it can reach targets
    that ``data.standardize_targets`` scaled (a bounded output was chosen for the targets' own range).
    forward: f(z) in numpy, float64 in and out, (n, m) → (n, m), in the kernel's own form (the reference
    tests compare with outside formulas). onnx: emits f(z) into a graph builder (``onnx(g, z, scope)`` → the
    output's name), in the kernel's operations and order. formula: f(z) as text (docs/models.md, the model card).
    onnx_operators: the operators the ONNX form uses, for the docs.
    """

    name: str
    code: int | None
    forward: Callable[[np.ndarray], np.ndarray]
    onnx: Callable[[Builder, str, str], str]
    formula: str
    onnx_operators: str
    relu_family: bool = False
    watch_saturation: bool = False
    watch_dead: bool = False
    unbounded: bool = False


def _log1p(g: Builder, u: str, scope: str) -> str:
    """log(1 + u) to a few ulps without a log1p op: w = 1 + u; u where w − 1 = 0, else u·log(w) / (w − 1)
    (Goldberg 1991, Theorem 4). The other branch's 0/0 is computed and not selected."""
    op, c = g.op, g.scalar
    w = op("Add", c(1.0), u, scope=scope)
    w_minus_1 = op("Sub", w, c(1.0), scope=scope)
    ratio = op("Div", op("Mul", u, op("Log", w, scope=scope), scope=scope), w_minus_1, scope=scope)
    return op("Where", op("Equal", w_minus_1, c(0.0), scope=scope), u, ratio, scope=scope)


def _identity_onnx(g: Builder, z: str, scope: str) -> str:
    return z


def _relu_onnx(g: Builder, z: str, scope: str) -> str:
    return g.op("Relu", z, scope=scope)  # max(z, 0)


def _leaky_relu_onnx(g: Builder, z: str, scope: str) -> str:
    # max(z, 0) + slope·min(z, 0), the slope in the model's dtype (not a float attribute)
    op, c = g.op, g.scalar
    return op("Add", op("Max", z, c(0.0), scope=scope),
              op("Mul", c(kernels.LEAKY_SLOPE), op("Min", z, c(0.0), scope=scope), scope=scope), scope=scope)


def _gelu_onnx(g: Builder, z: str, scope: str) -> str:
    # 0.5·z·(1 + tanh(C·(z + K·z·z·z))), multiplied left to right as the kernel does
    op, c = g.op, g.scalar
    cube = op("Mul", op("Mul", op("Mul", c(kernels.GELU_K), z, scope=scope), z, scope=scope), z, scope=scope)
    t = op("Tanh", op("Mul", c(kernels.GELU_C), op("Add", z, cube, scope=scope), scope=scope), scope=scope)
    return op("Mul", op("Mul", c(0.5), z, scope=scope), op("Add", c(1.0), t, scope=scope), scope=scope)


def _softplus_onnx(g: Builder, z: str, scope: str) -> str:
    # max(z, 0) + log1p(e^{−|z|})
    op, c = g.op, g.scalar
    u = op("Exp", op("Neg", op("Abs", z, scope=scope), scope=scope), scope=scope)
    return op("Add", op("Max", z, c(0.0), scope=scope), _log1p(g, u, scope), scope=scope)


def _sigmoid_onnx(g: Builder, z: str, scope: str) -> str:
    # e = e^{−|z|}: 1 / (1 + e) for z ≥ 0, e / (1 + e) for z < 0
    op, c = g.op, g.scalar
    e = op("Exp", op("Neg", op("Abs", z, scope=scope), scope=scope), scope=scope)
    numerator = op("Where", op("GreaterOrEqual", z, c(0.0), scope=scope), c(1.0), e, scope=scope)
    return op("Div", numerator, op("Add", c(1.0), e, scope=scope), scope=scope)


def _tanh_onnx(g: Builder, z: str, scope: str) -> str:
    return g.op("Tanh", z, scope=scope)


def _softmax_onnx(g: Builder, z: str, scope: str) -> str:
    # e = exp(z − row max); e · (1 / Σ e), as kernels.losses.softmax_rows
    op = g.op
    e = op("Exp", op("Sub", z, g.reduce("ReduceMax", z, scope), scope=scope), scope=scope)
    return op("Mul", e, op("Reciprocal", g.reduce("ReduceSum", e, scope), scope=scope), scope=scope)


def _sigmoid(z: np.ndarray) -> np.ndarray:
    e = np.exp(-np.abs(z))
    return np.where(z >= 0, 1.0 / (1.0 + e), e / (1.0 + e))


def _softplus(z: np.ndarray) -> np.ndarray:
    return np.maximum(z, 0.0) + np.log1p(np.exp(-np.abs(z)))


def _gelu(z: np.ndarray) -> np.ndarray:
    return 0.5 * z * (1.0 + np.tanh(kernels.GELU_C * (z + kernels.GELU_K * z * z * z)))


def _softmax(z: np.ndarray) -> np.ndarray:
    e = np.exp(z - z.max(axis=1, keepdims=True))
    return e * (1.0 / e.sum(axis=1, keepdims=True))


_TABLE = (
    Activation("identity", kernels.IDENTITY, lambda z: z, _identity_onnx, "f(z) = z", "none", unbounded=True),
    Activation("sigmoid", kernels.SIGMOID, _sigmoid, _sigmoid_onnx,
               "f(z) = 1 / (1 + exp(−z)) for z ≥ 0, exp(z) / (1 + exp(z)) for z < 0",
               "`Abs`, `Neg`, `Exp` (e = exp(−|z|)), `GreaterOrEqual`, `Where` (1 or e), `Add`, `Div`",
               watch_saturation=True),
    Activation("tanh", kernels.TANH, np.tanh, _tanh_onnx, "f(z) = tanh(z)", "`Tanh`", watch_saturation=True),
    Activation("relu", kernels.RELU, lambda z: np.maximum(z, 0.0), _relu_onnx, "f(z) = max(z, 0)", "`Relu`",
               relu_family=True, watch_dead=True),
    Activation("leaky_relu", kernels.LEAKY_RELU,
               lambda z: np.maximum(z, 0.0) + kernels.LEAKY_SLOPE * np.minimum(z, 0.0), _leaky_relu_onnx,
               f"f(z) = max(z, 0) + {kernels.LEAKY_SLOPE}·min(z, 0)",
               "`Max`, `Min`, `Mul` (slope in the model's dtype), `Add`", relu_family=True, watch_dead=True),
    Activation("gelu", kernels.GELU, _gelu, _gelu_onnx,
               f"f(z) = 0.5·z·(1 + tanh(√(2/π)·(z + {kernels.GELU_K}·z³))) (tanh form of Hendrycks & Gimpel 2016)",
               f"`Mul` ×3 ({kernels.GELU_K}·z·z·z), `Add`, `Mul`, `Tanh`, `Add`, `Mul` ×2", relu_family=True),
    Activation("softplus", kernels.SOFTPLUS, _softplus, _softplus_onnx, "f(z) = max(z, 0) + log1p(exp(−|z|))",
               "`Abs`, `Neg`, `Exp`, `Max`, `Add`, and log1p below", relu_family=True),
)
ACTIVATIONS: dict[str, Activation] = {entry.name: entry for entry in _TABLE}
"""The hidden-layer activations by name, in the order of the kernels' codes."""

SOFTMAX = Activation("softmax", None, _softmax, _softmax_onnx,
                     "f(z)_j = exp(z_j − max_i z_i) · (1 / Σ_i exp(z_i − max_i z_i)), per row",
                     "`ReduceMax`, `Sub`, `Exp`, `ReduceSum`, `Reciprocal`, `Mul`")
EXP = Activation("exp", None, np.exp, lambda g, z, scope: g.op("Exp", z, scope=scope), "f(z) = exp(z)", "`Exp`")
"""The log link's inverse: a Poisson model's outputs are expected counts e^z (its kernel: ``kernels.losses.exp_rows``,
or the loss itself in training)."""
OUTPUTS: dict[str, Activation] = {**ACTIVATIONS, SOFTMAX.name: SOFTMAX, EXP.name: EXP}
"""Every activation an output layer may have: the hidden ones, softmax (implied by softmax_cross_entropy) and exp
(implied by poisson)."""

FORMULAS: dict[str, str] = {name: entry.formula for name, entry in OUTPUTS.items()}
"""f(z) as text by activation name (the model card's ``formula``)."""

DOCS_BEGIN = "<!-- activations: generated by shardmill.model.activations.markdown(), do not edit by hand -->"
DOCS_END = "<!-- end of activations -->"


def relu_family_only(names: list[str]) -> bool:
    """True when there is at least one hidden layer and every one has a ReLU-family activation (He init suits)."""
    return bool(names) and all(ACTIVATIONS[name].relu_family for name in names)


def markdown() -> str:
    """The activation table of docs/models.md (activation, formula, ONNX operators), from the entries."""
    rows = ["| Activation | Formula (the code's) | ONNX operators |", "|---|---|---|"]
    for name, entry in OUTPUTS.items():
        label = f"{name} (output)" if entry.code is None else name
        formula, operators = (text.replace("|", "\\|") for text in (entry.formula, entry.onnx_operators))
        rows.append(f"| {label} | {formula} | {operators} |")
    return "\n".join(rows) + "\n"
