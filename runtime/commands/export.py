"""``shardmill export``: a trained model as an ONNX graph, and its model card (JSON).

The graph computes what :meth:`shardmill.model.predictor.Predictor.outputs` computes, from raw inputs:

    inputs (N, d) ─ standardise ─ per layer l: MatMul W_l, Add b_l, [layer norm], activation, [Add the skip]
    ─ [unscale] ─ outputs (N, k)

The standardisation stays two nodes (Sub input_mean, Mul input_inv_std) in float64, as training applied it
(``kernels/data.py``: (x − mean) · inv_std in float64, stored in the model's dtype); a float32 graph casts its
inputs to float64 for those two nodes and back. Folding them into W0 and b0 would be one matrix product less, but
b0 − (mean · inv_std) W0 cancels when a column's mean is large against its spread, and the float32 graph would
lose digits training never lost. Every activation is written out in the same primitive operations as its kernel
(its entry's ONNX form in ``model/activations.py``, after ``kernels/activations.py`` and ``kernels/losses.py``), so
the graph means exactly our definition whatever the runtime: no fused GELU or Softplus op, whose definitions differ
(erf or tanh form; log(1 + eˣ) without the stable split). Layer normalisation is written out the same way (row mean
and variance in float64 as ``kernels/layers.py`` forms them, then (z − μ)·r·g + β in the model's dtype), not as the
LayerNormalization op (opset 17 only, and its ε and precision are the runtime's). Dropout is absent: inverted dropout
scales at training time, so inference is the identity (Srivastava et al. 2014). A model trained on standardised
targets ends in two nodes more, Mul target_std and Add target_mean in float64 (as ``Predictor.unscale``), so the
graph answers in the targets' own units.

A model with categorical columns takes a second input, "codes" (N, c) int64: column j holds each row's code of the
j-th categorical column by the vocabulary in the model card (code i ≥ 1 is vocabulary[i − 1], 0 the unknown slot;
a code outside [0, rows of E_j) is taken as 0 in the graph). Each column's embedding is a Gather of its table's
rows, concatenated after the standardised numeric inputs, as ``kernels/layers.py`` ``embedding_forward`` does.
"""

from __future__ import annotations

import json
import os
from pathlib import Path
from typing import Any

import numpy as np
import onnx
from onnx import TensorProto, helper, numpy_helper
from shardmill.checkpoint import resolve
from shardmill.errors import JobError
from shardmill.kernels.layers import NORM_EPS
from shardmill.model.activations import OUTPUTS
from shardmill.model.predictor import Predictor, load_model

MIN_OPSET = 13  # ReduceSum takes its axes as an input, GreaterOrEqual exists
MAX_OPSET = onnx.defs.onnx_opset_version()  # the newest the installed onnx package knows
DEFAULT_OPSET = 17
EXTERNAL_DATA_BYTES = 1 << 30
"""Parameters above this many bytes go to a ``.data`` file beside the .onnx (protobuf caps one file at 2 GiB)."""

NORM_FORMULA = f"g ⊙ (z − μ) / √(σ² + {NORM_EPS:g}) + β, μ and σ² over the row's units (Ba, Kiros & Hinton 2016)"
CARD_FORMAT = "shardmill-model-card"
CARD_VERSION = 1

class _GraphBuilder:
    """Nodes and initializers of one graph, in the model's element type, with fresh tensor names."""

    def __init__(self, dtype: np.dtype, opset: int) -> None:
        self.dtype = dtype
        self.opset = opset
        self.nodes: list[onnx.NodeProto] = []
        self.initializers: list[onnx.TensorProto] = []
        self._count = 0
        self._constants: dict[tuple[str, float], str] = {}

    def tensor(self, name: str, array: np.ndarray) -> str:
        self.initializers.append(numpy_helper.from_array(np.ascontiguousarray(array), name))
        return name

    def scalar(self, value: float, dtype: np.dtype | None = None) -> str:
        """A 0-d constant (broadcast by every elementwise op), shared by every node that uses the same value."""
        dtype = np.dtype(dtype or self.dtype)
        key = (dtype.name, float(value))
        if key not in self._constants:
            self._constants[key] = self.tensor(f"const_{dtype.name}_{len(self._constants)}", np.array(value, dtype))
        return self._constants[key]

    def op(self, op_type: str, *inputs: str, scope: str = "", **attributes: Any) -> str:
        self._count += 1
        out = f"{scope}{op_type.lower()}_{self._count}"
        self.nodes.append(helper.make_node(op_type, list(inputs), [out], name=f"{scope}{op_type}_{self._count}",
                                           **attributes))
        return out

    def reduce(self, op_type: str, x: str, scope: str) -> str:
        """Reduce over axis 1 keeping it, (N, k) → (N, 1): axes an input from opset 18 (ReduceSum: 13), before
        that an attribute."""
        axes_as_input = self.opset >= (13 if op_type == "ReduceSum" else 18)
        if axes_as_input:
            axes = self.tensor(f"{scope}axes_{self._count}", np.array([1], dtype=np.int64))
            return self.op(op_type, x, axes, scope=scope, keepdims=1)
        return self.op(op_type, x, scope=scope, axes=[1], keepdims=1)

    def activation(self, name: str, z: str, scope: str) -> str:
        """f(z) for the activation ``name``, in the operations and order of its kernel (the entry's ONNX form)."""
        if name not in OUTPUTS:
            raise ValueError(f"no ONNX form for activation {name!r}")
        return OUTPUTS[name].onnx(self, z, scope)

    def layer_norm(self, z: str, gain: str, shift: str, scope: str) -> str:
        """g ⊙ (z − μ)·r + β per row, r = 1/√(σ² + ε), in the kernel's order: μ, σ², r in float64, then cast."""
        elem = helper.np_dtype_to_tensor_dtype(self.dtype)
        z64 = z if self.dtype == np.float64 else self.op("Cast", z, scope=scope, to=TensorProto.DOUBLE)
        mu = self.reduce("ReduceMean", z64, scope)
        centred = self.op("Sub", z64, mu, scope=scope)
        var = self.reduce("ReduceMean", self.op("Mul", centred, centred, scope=scope), scope)
        std = self.op("Sqrt", self.op("Add", var, self.scalar(NORM_EPS, np.float64), scope=scope), scope=scope)
        r = self.op("Reciprocal", std, scope=scope)
        if self.dtype != np.float64:
            mu, r = self.op("Cast", mu, scope=scope, to=elem), self.op("Cast", r, scope=scope, to=elem)
        xhat = self.op("Mul", self.op("Sub", z, mu, scope=scope), r, scope=scope)
        return self.op("Add", self.op("Mul", gain, xhat, scope=scope), shift, scope=scope)


def output_activation(predictor: Predictor) -> str:
    """The output layer's activation: the one the loss implies (softmax, sigmoid), or ``model.output`` where the
    loss lets the job choose it (MLP resolves "auto" to the implied one)."""
    return predictor.model.output


def check_opset(opset: int | str) -> int:
    """The opset as an int, or a JobError naming ``--opset``, the value and the range (a command line's text too)."""
    if isinstance(opset, str) and opset.strip().isdigit():
        opset = int(opset)
    if isinstance(opset, bool) or not isinstance(opset, int) or not MIN_OPSET <= opset <= MAX_OPSET:
        raise JobError(f"`--opset` must be an integer from {MIN_OPSET} to {MAX_OPSET}; got {opset!r}")
    return opset


def build_onnx(predictor: Predictor, opset: int = DEFAULT_OPSET) -> onnx.ModelProto:
    """The ONNX model of ``predictor``: input "inputs" (N, d), output "outputs" (N, k), in the model's dtype."""
    check_opset(opset)
    model = predictor.model
    dtype = model.dtype
    elem = helper.np_dtype_to_tensor_dtype(dtype)
    g = _GraphBuilder(dtype, opset)
    scope = "standardise/"
    x = "inputs"
    if dtype != np.float64:
        x = g.op("Cast", x, scope=scope, to=TensorProto.DOUBLE)
    x = g.op("Sub", x, g.tensor("input_mean", predictor.input_mean.astype(np.float64)), scope=scope)
    x = g.op("Mul", x, g.tensor("input_inv_std", predictor.input_inv_std.astype(np.float64)), scope=scope)
    if dtype != np.float64:
        x = g.op("Cast", x, scope=scope, to=elem)
    if model.embeddings:
        x = embed(g, model, x)
    activations = [*model.activations, output_activation(predictor)]
    for l in range(model.n_layers):
        scope = f"layer{l}/"
        z = g.op("MatMul", x, g.tensor(f"W{l}", model.weights[l]), scope=scope)
        z = g.op("Add", z, g.tensor(f"b{l}", model.biases[l]), scope=scope)
        if model.has_norm(l):
            z = g.layer_norm(z, g.tensor(f"G{l}", model.gains[l]), g.tensor(f"B{l}", model.shifts[l]), scope)
        h = g.activation(activations[l], z, scope)
        x = g.op("Add", h, x, scope=scope) if l < model.n_layers - 1 and model.skips[l] else h
    if predictor.target_std is not None:
        x = unscale(g, predictor, x)
    if g.nodes[-1].output[0] != x:
        raise AssertionError("the graph's last node must produce its output")
    g.nodes[-1].output[0] = "outputs"
    d, k = model.n_numeric, model.sizes[-1]
    inputs = [helper.make_tensor_value_info("inputs", elem, ["N", d])]
    if model.embeddings:
        inputs.append(helper.make_tensor_value_info("codes", TensorProto.INT64, ["N", len(model.embeddings)]))
    graph = helper.make_graph(
        g.nodes, "shardmill_mlp",
        inputs,
        [helper.make_tensor_value_info("outputs", elem, ["N", k])],
        initializer=g.initializers,
        doc_string=f"raw inputs (N, {d}) → {' → '.join(activations)} → outputs (N, {k}); loss {model.loss}")
    opsets = [helper.make_opsetid("", opset)]
    from shardmill.version import __version__

    onnx_model = helper.make_model(graph, opset_imports=opsets, producer_name="shardmill",
                                   producer_version=__version__, ir_version=helper.find_min_ir_version_for(opsets))
    helper.set_model_props(onnx_model, {
        "shardmill.loss": model.loss,
        "shardmill.activations": json.dumps(activations),
        "shardmill.job_digest": predictor.digest or "",
        "shardmill.step": "" if predictor.step is None else str(predictor.step),
        "shardmill.feature_names": json.dumps(predictor.feature_names),
        **({"shardmill.categories": json.dumps([c.record() for c in predictor.categories])}
           if predictor.categories else {}),
    })
    return onnx_model


def unscale(g: _GraphBuilder, predictor: Predictor, x: str) -> str:
    """o · target_std + target_mean (N, k) in float64, cast back to the model's dtype: the targets' own units."""
    scope = "unscale/"
    dtype = predictor.model.dtype
    if dtype != np.float64:
        x = g.op("Cast", x, scope=scope, to=TensorProto.DOUBLE)
    x = g.op("Mul", x, g.tensor("target_std", predictor.target_std.astype(np.float64)), scope=scope)
    x = g.op("Add", x, g.tensor("target_mean", predictor.target_mean.astype(np.float64)), scope=scope)
    if dtype != np.float64:
        x = g.op("Cast", x, scope=scope, to=helper.np_dtype_to_tensor_dtype(dtype))
    return x


def embed(g: _GraphBuilder, model, x: str) -> str:
    """[x, E_0[codes[:, 0]], E_1[codes[:, 1]], …] (N, d0): each column's code, out of range → 0 (the unknown slot),
    gathers its table's row."""
    scope = "embed/"
    parts = [x]
    tables = model.embedding_views(model.params)
    for j, (column, rows, _) in enumerate(model.embeddings):
        index = f"{scope}column_{j}"  # 0-d, so the Gather drops the axis: (N, c) → (N,)
        g.initializers.append(numpy_helper.from_array(np.array(j, dtype=np.int64), index))
        code = g.op("Gather", "codes", index, scope=scope, axis=1)
        zero = g.tensor(f"{scope}zero_{j}", np.array(0, dtype=np.int64))
        inside = g.op("And", g.op("GreaterOrEqual", code, zero, scope=scope),
                      g.op("Less", code, g.tensor(f"{scope}rows_{j}", np.array(rows, dtype=np.int64)), scope=scope),
                      scope=scope)
        code = g.op("Where", inside, code, zero, scope=scope)
        parts.append(g.op("Gather", g.tensor(f"E_{column}", tables[f"E_{column}"]), code, scope=scope, axis=0))
    return g.op("Concat", *parts, scope=scope, axis=1)


def export_onnx(predictor: Predictor, path: Path, opset: int = DEFAULT_OPSET) -> list[Path]:
    """Write ``predictor`` as an ONNX model to ``path``, checked by ``onnx.checker`` (full check, shape inference).

    When the parameters take more than :data:`EXTERNAL_DATA_BYTES` bytes, every tensor above 64 bytes goes to
    ``<path>.data`` beside it (ONNX's external data; the 0-d constants and axes stay inline). Returns the files
    written. The file appears whole or not at all (written to a temporary name, then renamed).
    """
    path = Path(path)
    onnx_model = build_onnx(predictor, opset)
    external = predictor.model.params.nbytes > EXTERNAL_DATA_BYTES
    tmp = path.with_name(f".{path.name}.tmp-{os.getpid()}")
    written = [path]
    try:
        if external:
            data = path.with_name(path.name + ".data")
            onnx.save_model(onnx_model, tmp, save_as_external_data=True, all_tensors_to_one_file=True,
                            location=data.name, size_threshold=64)  # small constants stay inline for shape inference
            onnx.checker.check_model(tmp, full_check=True)  # a path: the checker reads the data file beside it
            written.append(data)
        else:
            onnx.checker.check_model(onnx_model, full_check=True)
            onnx.save_model(onnx_model, tmp)
        os.replace(tmp, path)
    finally:
        tmp.unlink(missing_ok=True)
    return written


def _workdir_of(source: Path) -> Path:
    """The workdir a model file or checkpoint sits in: final.npz's folder, or the checkpoint's workdir."""
    source = Path(source)
    if source.is_file():
        return source.parent
    checkpoint_dir = resolve(source)
    return checkpoint_dir.parent.parent if checkpoint_dir.parent.name == "checkpoints" else source


def last_epoch_record(workdir: Path, step: int | None = None) -> dict[str, Any] | None:
    """The last epoch record of ``workdir/metrics.jsonl`` at or before ``step`` (any step when None), or None
    without one. A line cut short by a killed run is skipped."""
    path = Path(workdir) / "metrics.jsonl"
    if not path.is_file():
        return None
    found = None
    for line in path.read_text().splitlines():
        try:
            record = json.loads(line)
        except json.JSONDecodeError:
            continue
        if isinstance(record, dict) and record.get("kind") == "epoch" and (step is None or record["step"] <= step):
            found = record
    return found


def model_card(predictor: Predictor, source: Path) -> dict[str, Any]:
    """The model card of ``predictor`` loaded from ``source`` (what :func:`load_model` took), as a JSON-ready dict.

    Fields: format, format_version, source, dtype, inputs (count, feature_names, mean, inv_std, std = 1/inv_std,
    how they are applied), layers (fan_in, fan_out, tensor names, norm and its tensors, activation and its formula,
    dropout rate in training, residual skip), output (activation, formula, loss, loss formula, labels,
    target_scaling: mean, std and rule, or null), training (job, digest, step) and metrics (the workdir's last
    epoch record of metrics.jsonl up to the model's step, or null).
    """
    model = predictor.model
    activations = [*model.activations, output_activation(predictor)]
    layers = [{"index": l, "weights": f"W{l}", "bias": f"b{l}", "fan_in": model.sizes[l],
               "fan_out": model.sizes[l + 1], "activation": activations[l],
               "formula": OUTPUTS[activations[l]].formula} for l in range(model.n_layers)]
    for h in range(model.n_layers - 1):
        layers[h]["norm"] = model.norm
        if model.has_norm(h):
            layers[h].update(gain=f"G{h}", shift=f"B{h}", norm_formula=NORM_FORMULA)
        layers[h]["dropout"] = model.dropout[h]  # training only; the graph and predict apply none
        layers[h]["residual"] = model.skips[h]
    mean, inv_std = predictor.input_mean, predictor.input_inv_std
    categorical = [{"column": c.column, "position": j, "embedding": f"E_{c.column}", "rows": c.rows,
                    "width": c.width, "unknown_code": 0, "vocabulary": c.vocabulary}
                   for j, c in enumerate(predictor.categories)]
    if categorical:
        layers[0]["fan_in_rule"] = (f"{model.n_numeric} numeric inputs + the embedding widths "
                                    f"{[c.width for c in predictor.categories]}")
    card = {
        "format": CARD_FORMAT,
        "format_version": CARD_VERSION,
        "source": str(source),
        "dtype": model.dtype.name,
        "inputs": {
            "count": model.n_numeric,
            "feature_names": predictor.feature_names,
            "mean": mean.tolist(),
            "inv_std": inv_std.tolist(),
            "std": (1.0 / inv_std).tolist(),
            "standardisation": "x̃ = (x − mean) · inv_std per column, in float64, then cast to dtype "
                               "(inv_std = 1 for a column without spread)",
        },
        "layers": layers,
        "output": {
            "count": model.sizes[-1],
            "activation": activations[-1],
            "formula": OUTPUTS[activations[-1]].formula,
            "loss": model.loss,
            "loss_formula": model.loss_entry.formula,
            "labels": model.loss_entry.label_rule,
            "target_scaling": None if predictor.target_std is None else {
                "mean": predictor.target_mean.tolist(), "std": predictor.target_std.tolist(),
                "rule": "the network was trained on (t − mean) / std per output (data.standardize_targets); the "
                        "graph's last nodes give o · std + mean in float64, cast to dtype: the targets' own units"},
        },
        "training": {"job": predictor.job, "digest": predictor.digest, "step": predictor.step},
        "metrics": last_epoch_record(_workdir_of(source), predictor.step),
    }
    if categorical:
        card["inputs"]["categorical"] = categorical
        card["inputs"]["codes"] = ("the graph's input \"codes\" (N, c) int64: column j holds the code of the "
                                   "categorical column at position j, code i ≥ 1 = vocabulary[i − 1], 0 = a value "
                                   "unseen in training (the unknown slot; out-of-range codes are taken as 0)")
    return card


def write_model_card(predictor: Predictor, source: Path, path: Path, onnx_path: Path | None = None,
                     opset: int | None = None) -> dict[str, Any]:
    """Write :func:`model_card` as indented JSON to ``path`` (atomically); with ``onnx_path``, the card also names
    the graph file, its opset and its input and output. Returns the card."""
    card = model_card(predictor, source)
    if onnx_path is not None:
        card["onnx"] = {"file": Path(onnx_path).name, "opset": opset, "input": "inputs", "output": "outputs"}
        if predictor.categories:
            card["onnx"]["codes_input"] = "codes"
    path = Path(path)
    tmp = path.with_name(f".{path.name}.tmp-{os.getpid()}")
    tmp.write_text(json.dumps(card, indent=1, ensure_ascii=False) + "\n")
    os.replace(tmp, path)
    return card


def cmd_export(args) -> int:
    """``shardmill export MODEL --out model.onnx [--card FILE] [--opset N]``: the ONNX graph and the model card.

    ``args.model``: a final.npz, best.npz, checkpoint directory or workdir; ``args.out``: the .onnx path (its
    folder must exist); ``args.card``: the card's path (default: ``--out`` with ``.card.json`` for ``.onnx``);
    ``args.opset``: the ONNX opset. Every argument is checked before any work.
    """
    out = Path(args.out)
    if out.suffix.lower() != ".onnx":
        raise JobError(f"`--out` must end in .onnx; got {str(out)!r}")
    if not out.parent.is_dir():
        raise JobError(f"`--out` folder {str(out.parent)!r} does not exist")
    card = Path(args.card) if getattr(args, "card", None) is not None else out.with_suffix(".card.json")
    if card.suffix.lower() != ".json":
        raise JobError(f"`--card` must end in .json; got {str(card)!r}")
    if not card.parent.is_dir():
        raise JobError(f"`--card` folder {str(card.parent)!r} does not exist")
    if card.resolve() == out.resolve():
        raise JobError(f"`--card` must differ from `--out`; both are {str(out)!r}")
    opset = getattr(args, "opset", None)
    opset = check_opset(DEFAULT_OPSET if opset is None else opset)
    source = Path(args.model)
    if not source.exists():
        raise JobError(f"`MODEL` {str(source)!r} does not exist; give a final.npz, best.npz, a checkpoint "
                       f"directory or a workdir")
    predictor = load_model(source)
    try:
        files = export_onnx(predictor, out, opset)
    except OSError as err:
        raise JobError(f"`--out` {str(out)!r} cannot be written: {err.strerror or err}") from None
    try:
        write_model_card(predictor, source, card, onnx_path=out, opset=opset)
    except OSError as err:
        raise JobError(f"`--card` {str(card)!r} cannot be written: {err.strerror or err}") from None
    model = predictor.model
    codes = f" + {len(model.embeddings)} category codes" if model.embeddings else ""
    print(f"wrote {files[0]} (ONNX opset {opset}, {model.dtype.name}, {model.n_numeric} inputs{codes} → "
          f"{model.sizes[-1]} outputs)")
    for extra in files[1:]:
        print(f"wrote {extra} (the graph's parameters)")
    print(f"wrote {card} (model card)")
    return 0
