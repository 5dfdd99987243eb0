"""The multilayer perceptron: flat parameter layout, initialisation, and the three GEMMs per layer.

All parameters live in one flat array ``params``. Layers are laid out *last layer first*
(``W_{L-1}, b_{L-1}, …, W_0, b_0``) because backward produces gradients in that order: after backward has
finished layer l, the gradient prefix ``grads[:end_of(l)]`` is complete and can go on the wire as one
contiguous message. ``weights[l]`` (fan_in, fan_out) and ``biases[l]`` (fan_out,) are views into ``params``;
with ``norm = "layer"`` a hidden layer's range ends with its normalisation's gain ``G_l`` and shift ``B_l``
(fan_out,) each, so a layer's message still holds every parameter of the layer. The embedding tables of the
categorical inputs ``E_<column>`` (rows, width) end layer 0's range: they feed layer 0, and their gradient is
complete with it (the "layer before layer 0" travels in layer 0's message).

The first layer's input row is [standardised numeric columns, E_<c₁>[code₁], E_<c₂>[code₂], …]
(``kernels/layers.py`` ``embedding_forward``); ``layers[0]`` counts each categorical column once, and the runtime
widens the first layer by the embedding widths.

A hidden layer h, in order (``kernels/layers.py``; docs/models.md has the formulas and sources):
Z = A_h W_h + b_h → [layer norm N = g ⊙ (Z − μ)/σ + β] → H = f(·) → [dropout H ⊙ keep/(1 − p), training only]
→ [+ A_h, the residual skip] = A_{h+1}.
"""

from __future__ import annotations

import math
from collections.abc import Iterator

import numpy as np
from shardmill.config import Job, default, model_spec, residual_layers
from shardmill.errors import JobError
from shardmill.kernels import activations as act
from shardmill.kernels import layers, threaded
from shardmill.model.activations import ACTIVATIONS, relu_family_only
from shardmill.model.losses import LOSSES


class MLP:
    """A fully connected network ``layers[0] → … → layers[-1]``.

    Parameters
    ----------
    layers: widths, inputs first, outputs last (at least two entries).
    activation: hidden activation, one name or one per hidden layer (identity, sigmoid, tanh, relu, leaky_relu,
        gelu, softplus).
    loss: softmax_cross_entropy (y: int labels (n,)), binary_cross_entropy (y: 0/1 (n, k)), squared_error, huber,
        absolute_error (y: targets (n, k)) or poisson (y: counts ≥ 0 (n, k)); the loss implies the output activation
        (softmax, sigmoid, identity, exp; model/losses.py holds each loss's entry and formula).
    dtype: "float32" or "float64", used end to end.
    seed: seed of the numpy Generator that draws the initial weights; biases start at zero.
    init: "he" (normal, variance 2/fan_in), "glorot" (uniform, variance 2/(fan_in + fan_out)) or "auto"
        (he when every hidden activation is of the relu family, else glorot).
    output: for squared_error, huber and absolute_error, an activation applied to the output layer (default
        identity).
    huber_delta: δ of the huber loss (residuals beyond it count linearly), in the targets' units; huber only.
    norm: "none" or "layer" (layer normalisation of each hidden layer's pre-activations, learned gain and shift).
    dropout: inverted dropout rate in [0, 1) of the hidden outputs, one or one per hidden layer; applied only when a
        step is given (training), its keep decision a pure function of (seed, step, global row, layer, unit).
    residual: identity skip connections around the hidden layers h ≥ 1 whose input and output widths are equal.
    embeddings: (column, rows, width) of each categorical input's embedding table, in input order (rows: the
        vocabulary and the unknown slot); ``layers[0]`` counts each such column once.
    """

    def __init__(self, layers: list[int], activation: str | list[str] = default("model.activation"),
                 loss: str = default("model.loss"), dtype: str = default("model.dtype"), seed: int = 0,
                 init: str = default("model.init"), output: str = default("model.output"),
                 huber_delta: float = default("model.huber_delta"), norm: str = default("model.norm"),
                 dropout: float | list[float] = default("model.dropout"),
                 residual: bool = default("model.residual"),
                 embeddings: list[tuple[str, int, int]] | None = None) -> None:
        # The same checks and messages as the job file's [model] table (config.model_spec).
        spec = model_spec({"layers": list(layers), "activation": activation, "loss": loss, "dtype": dtype,
                           "init": init, "output": output, "huber_delta": huber_delta, "norm": norm,
                           "dropout": dropout, "residual": residual})
        self.embeddings = [(str(c), int(r), int(w)) for c, r, w in embeddings or []]
        self.n_numeric = spec.layers[0] - len(self.embeddings)  # the numeric input columns
        if self.n_numeric < 0:
            raise JobError(f"`model.layers` starts with {spec.layers[0]} inputs, fewer than the "
                           f"{len(self.embeddings)} categorical columns")
        self.input_columns = spec.layers[0]  # numeric + categorical, as the job counts them
        self.sizes = [self.n_numeric + sum(w for _, _, w in self.embeddings)] + spec.layers[1:]
        self.activations = spec.activation
        self.loss = spec.loss
        self.dtype = np.dtype(spec.dtype)
        self.huber_delta = spec.huber_delta
        self.seed = seed  # also the dropout decision's
        self.norm = spec.norm
        self.layer_norm = spec.norm == "layer"
        n_hidden = len(self.sizes) - 2
        self.dropout = spec.dropout if isinstance(spec.dropout, list) else [spec.dropout] * n_hidden
        self.residual = spec.residual
        skips = residual_layers(self.sizes) if spec.residual else []
        self.skips = [h in skips for h in range(n_hidden)]  # hidden layer h adds its input A_h to its output
        # the loss's kernels, targets, metrics and labels, with its parameters (huber's δ) fixed
        self.loss_entry = LOSSES[self.loss].bound(huber_delta=spec.huber_delta)
        self.output = self.loss_entry.output if spec.output == "auto" else spec.output
        self.init = spec.init
        if self.init == "auto":
            self.init = "he" if relu_family_only(self.activations) else "glorot"
        self.hidden_codes = [ACTIVATIONS[a].code for a in self.activations]
        # the code the forward pass applies to the output layer: the identity where the loss kernel applies it
        self.output_code = act.IDENTITY if self.loss_entry.from_logits else ACTIVATIONS[self.output].code

        # Layout: last layer first, W before b within a layer, then a hidden layer's norm gain and shift.
        self.slices: list[tuple[int, int]] = [(0, 0)] * self.n_layers  # (start, stop) of layer l in params
        offset = 0
        for l in reversed(range(self.n_layers)):
            size = self.sizes[l] * self.sizes[l + 1] + self.sizes[l + 1] * (1 + 2 * self.has_norm(l))
            self.slices[l] = (offset, offset + size)
            offset += size
        # the embedding tables end layer 0's range: E_j at offsets[j], row-major (rows, width)
        self.embedding_offsets = np.zeros(len(self.embeddings), dtype=np.int64)
        self.embedding_widths = np.array([w for _, _, w in self.embeddings], dtype=np.int64)
        for j, (_, rows, width) in enumerate(self.embeddings):
            self.embedding_offsets[j] = offset
            offset += rows * width
        self.slices[0] = (self.slices[0][0], offset)
        self._params = np.zeros(offset, dtype=self.dtype)
        self.weights, self.biases = self.views(self._params)
        self.gains, self.shifts = self.norm_views(self._params)
        self._initialise(seed)
        self._workspaces: dict[int, Workspace] = {}

    def has_norm(self, l: int) -> bool:
        """Whether weight layer l is a hidden layer with layer normalisation (and so gain and shift parameters)."""
        return self.layer_norm and l < self.n_layers - 1

    @property
    def n_layers(self) -> int:
        """Number of weight layers L (= len(layers) − 1)."""
        return len(self.sizes) - 1

    @property
    def n_params(self) -> int:
        return self._params.size

    @property
    def params(self) -> np.ndarray:
        """Flat 1-D array of every parameter, (n_params,) in the model's dtype. Assigning copies in place."""
        return self._params

    @params.setter
    def params(self, values: np.ndarray) -> None:
        self._params[...] = values

    def views(self, flat: np.ndarray) -> tuple[list[np.ndarray], list[np.ndarray]]:
        """Weight views (fan_in, fan_out) and bias views (fan_out,) of any array with the params layout."""
        ws, bs = [], []
        for l in range(self.n_layers):
            start, _ = self.slices[l]
            fan_in, fan_out = self.sizes[l], self.sizes[l + 1]
            mid = start + fan_in * fan_out
            ws.append(flat[start:mid].reshape(fan_in, fan_out))
            bs.append(flat[mid:mid + fan_out])
        return ws, bs

    def norm_views(self, flat: np.ndarray) -> tuple[list[np.ndarray | None], list[np.ndarray | None]]:
        """Gain and shift views (fan_out,) of each layer's normalisation (None where the layer has none)."""
        gains: list[np.ndarray | None] = [None] * self.n_layers
        shifts: list[np.ndarray | None] = [None] * self.n_layers
        for l in range(self.n_layers):
            if self.has_norm(l):
                width = self.sizes[l + 1]
                stop = self.slices[l][0] + self.sizes[l] * width + 3 * width
                gains[l], shifts[l] = flat[stop - 2 * width:stop - width], flat[stop - width:stop]
        return gains, shifts

    def embedding_views(self, flat: np.ndarray) -> dict[str, np.ndarray]:
        """{"E_<column>": (rows, width) view} of each embedding table of a flat array with the params layout."""
        return {f"E_{column}": flat[start:start + rows * width].reshape(rows, width)
                for (column, rows, width), start in zip(self.embeddings, self.embedding_offsets.tolist(),
                                                        strict=True)}

    def embedding_range(self) -> tuple[int, int]:
        """[start, stop) of every embedding table together in the flat layout (empty without categorical inputs)."""
        start = int(self.embedding_offsets[0]) if self.embeddings else self.slices[0][1]
        return start, self.slices[0][1]

    def names(self) -> list[str]:
        """Tensor names in checkpoint order: W0, b0, (G0, B0: the norm's gain and shift), W1, b1, …, E_<column>…"""
        return list(self.named(self._params))

    def named(self, flat: np.ndarray) -> dict[str, np.ndarray]:
        """{"W0": view, "b0": view, "G0": view, "B0": view, …} of a flat array with the params layout."""
        ws, bs = self.views(flat)
        gains, shifts = self.norm_views(flat)
        out: dict[str, np.ndarray] = {}
        for l in range(self.n_layers):
            out[f"W{l}"], out[f"b{l}"] = ws[l], bs[l]
            if self.has_norm(l):
                out[f"G{l}"], out[f"B{l}"] = gains[l], shifts[l]
        out.update(self.embedding_views(flat))
        return out

    def _initialise(self, seed: int) -> None:
        rng = np.random.default_rng(seed)
        for l in range(self.n_layers):
            fan_in, fan_out = self.sizes[l], self.sizes[l + 1]
            if self.init == "he":  # He et al. 2015: N(0, 2 / fan_in)
                w = rng.normal(0.0, np.sqrt(2.0 / fan_in), size=(fan_in, fan_out))
            else:  # Glorot & Bengio 2010: U(−a, a), a = √(6 / (fan_in + fan_out))
                limit = np.sqrt(6.0 / (fan_in + fan_out))
                w = rng.uniform(-limit, limit, size=(fan_in, fan_out))
            self.weights[l][...] = w
            self.biases[l][...] = 0.0
            if self.has_norm(l):  # Ba, Kiros & Hinton 2016: the gain starts at 1, the shift at 0
                self.gains[l][...] = 1.0
                self.shifts[l][...] = 0.0
        for table in self.embedding_views(self._params).values():  # N(0, 1): the scale of a standardised column
            table[...] = rng.normal(0.0, 1.0, size=table.shape)  # (common practice)

    def workspace(self, rows: int) -> Workspace:
        """Buffers for batches of up to ``rows`` rows, allocated once and reused."""
        if rows not in self._workspaces:
            self._workspaces[rows] = Workspace(self, rows)
        return self._workspaces[rows]

    def check_inputs(self, X: np.ndarray, name: str = "X") -> None:
        """X must be (n, numeric input columns)."""
        if X.ndim != 2 or X.shape[1] != self.n_numeric:
            raise JobError(f"`{name}` must have shape (n, {self.n_numeric}); got {X.shape}")

    def check_codes(self, codes: np.ndarray | None, n: int, name: str = "codes") -> np.ndarray:
        """Category codes as int64 (n, c), each in [0, rows of its table): 0 is the unknown slot."""
        c = len(self.embeddings)
        if not c:
            return np.zeros((n, 0), dtype=np.int64)
        if codes is None:
            raise JobError(f"the model takes {c} categorical columns; give `{name}` ({n}, {c})")
        codes = np.asarray(codes)
        if codes.shape != (n, c) or codes.dtype.kind not in "iu":
            raise JobError(f"`{name}` must be integer codes of shape ({n}, {c}); got {codes.dtype} {codes.shape}")
        rows = np.array([r for _, r, _ in self.embeddings])
        bad = (codes < 0) | (codes >= rows)
        if bad.any():
            i, j = np.argwhere(bad)[0]
            raise JobError(f"`{name}` row {i}: code {int(codes[i, j])} of column {self.embeddings[j][0]!r} is outside "
                           f"[0, {rows[j]})")
        return np.ascontiguousarray(codes, dtype=np.int64)

    def check_targets(self, y: np.ndarray, n: int, name: str = "y") -> np.ndarray:
        """Validate targets for this model's loss and return them in the dtype the kernels take."""
        return self.loss_entry.check_targets(y, n, self.sizes[-1], self.dtype, name)

    def loss_and_grad(self, X: np.ndarray, y: np.ndarray, weights: np.ndarray | None = None,
                      step: int | None = None, codes: np.ndarray | None = None) -> tuple[float, np.ndarray]:
        """Mean loss over the n rows of X and its gradient, flat in the params layout (a new array).

        ``weights``: one weight ≥ 0 per row, (n,); the loss is then Σ w·ℓ / Σ w (as a weighted job trains).
        ``step``: apply dropout as training step ``step`` would, row i of X taken as global row i; None: no dropout.
        ``codes``: (n, c) int64 category codes of the categorical columns (models with embeddings).
        """
        X = np.asarray(X)
        self.check_inputs(X)
        targets = self.check_targets(np.asarray(y), X.shape[0])
        n = X.shape[0]
        w = np.ones(n) if weights is None else check_weights(np.asarray(weights), n, "weights")
        total_weight = float(n) if weights is None else math.fsum(w)
        codes = self.check_codes(codes, n)
        ws = self.workspace(n)
        ws.numeric[:n] = X
        ws.codes[:n] = codes
        grads = np.empty_like(self._params)
        rows = None if step is None else np.arange(n, dtype=np.int64)
        total = ws.forward_loss(n, targets, w, 1.0 / total_weight, step=step, rows=rows)
        for _ in ws.backward(n, grads):
            pass
        return total / total_weight, grads

    def predict(self, X: np.ndarray, batch: int = 4096, codes: np.ndarray | None = None) -> np.ndarray:
        """Outputs after the output activation, (n, k) in the model's dtype (probabilities for cross-entropy).
        ``codes``: (n, c) int64 category codes (models with embeddings)."""
        X = np.asarray(X)
        self.check_inputs(X)
        n = X.shape[0]
        codes = self.check_codes(codes, n)
        out = np.empty((n, self.sizes[-1]), dtype=self.dtype)
        rows = max(1, min(batch, n))
        ws = self.workspace(rows)
        for lo in range(0, n, rows):
            m = min(rows, n - lo)
            ws.numeric[:m] = X[lo:lo + m]
            ws.codes[:m] = codes[lo:lo + m]
            out[lo:lo + m] = ws.forward_outputs(m)
        return out


class Workspace:
    """Activations, pre-activations and deltas for batches of up to ``rows`` rows, allocated once.

    ``inputs`` (rows, d0) is the first layer's input. The data layer takes rows into ``numeric`` (rows, numeric
    columns) and their category codes into ``codes`` (rows, c) int64; with embeddings, :meth:`forward` composes
    ``inputs`` from them, else ``numeric`` is ``inputs`` itself. Nothing here allocates per step:
    every GEMM writes with ``out=`` into these buffers or into the gradient views, every kernel into buffers made
    here. Per hidden layer h: ``Z[h]`` the pre-activations after the bias, ``H[h]`` the activation's output (of Z, or
    of the normalised N, which :meth:`preactivations` forms again), ``A[h + 1]`` the layer's output (H, or after
    dropout and skip).
    """

    def __init__(self, model: MLP, rows: int) -> None:
        self.model = model
        self.rows = rows
        dt, sizes, L = model.dtype, model.sizes, model.n_layers
        self.inputs = np.zeros((rows, sizes[0]), dtype=dt)
        embedded = bool(model.embeddings)
        self.numeric = np.zeros((rows, model.n_numeric), dtype=dt) if embedded else self.inputs
        self.codes = np.zeros((rows, len(model.embeddings)), dtype=np.int64)
        self.Z = [np.zeros((rows, sizes[l + 1]), dtype=dt) for l in range(L)]
        self.A = [self.inputs]
        self.pre, self.H, self.stats, self.keep = [], [], [], []
        for h in range(L - 1):
            norm = model.has_norm(h)
            self.stats.append(np.zeros((rows, 2)) if norm else None)  # (μ, 1/σ) per row, float64
            self.pre.append(None if norm else self.Z[h])  # the norm's N is formed again where needed, not kept
            # identity layers without norm reuse their pre-activations
            reuse = not norm and model.hidden_codes[h] == act.IDENTITY
            self.H.append(self.Z[h] if reuse else np.zeros_like(self.Z[h]))
            branch = model.dropout[h] > 0 or model.skips[h]
            self.A.append(np.zeros_like(self.Z[h]) if branch else self.H[h])
            self.keep.append(np.zeros(self.Z[h].shape, dtype=np.uint8) if model.dropout[h] > 0 else None)
        self.dropped = [False] * (L - 1)  # whether the last forward pass applied dropout to hidden layer h
        self.O = np.zeros((rows, sizes[-1]), dtype=dt)
        width = max(sizes) if embedded else max(sizes[1:])  # with embeddings, backward forms dA of layer 0's input
        self._delta = (np.zeros(rows * width, dtype=dt), np.zeros(rows * width, dtype=dt))
        self._saved = np.zeros(rows * width, dtype=dt)  # the skip's share of ∂loss/∂A_{h+1}
        self._zero_bias = np.zeros(sizes[-1], dtype=dt)
        self._scratch = np.zeros((2, width))  # the norm's forward row sums, float64
        self._row_sums = np.zeros((2, width), dtype=dt)  # its backward row sums, in the dtype
        self._block_sums = np.zeros(threaded.MAX_SUM_BLOCKS * width, dtype=dt)  # the fused bias gradient's blocks
        # verify's: when set, (rows, m) buffers per normed hidden layer that backward fills with ∂loss/∂H (after
        # dropout) before the norm kernel overwrites it
        self.norm_input: dict[int, np.ndarray] | None = None
        self.input_gradient: np.ndarray | None = None  # verify's: (rows, d0) that backward fills with dA₀

    def delta(self, which: int, n: int, width: int) -> np.ndarray:
        """A contiguous (n, width) view of ping-pong delta buffer ``which``."""
        return self._delta[which][: n * width].reshape(n, width)

    def forward(self, n: int, step: int | None = None, rows: np.ndarray | None = None) -> np.ndarray:
        """Z_l = A_{l−1} @ W_l (BLAS), then the hidden layer's parts (bias, norm, activation, dropout, skip);
        returns the output logits Z_L (n, k). Dropout applies only with ``step`` (the global step) and ``rows``
        ((n,) int64, the global indices of the n rows)."""
        m = self.model
        if m.embeddings:
            layers.embedding_forward(self.numeric[:n], self.codes[:n], m.params, m.embedding_offsets,
                                     m.embedding_widths, self.inputs[:n])
        for l in range(m.n_layers):
            Z = self.Z[l][:n]
            np.matmul(self.A[l][:n], m.weights[l], out=Z)
            if l < m.n_layers - 1:
                self.hidden_forward(l, n, step, rows)
            elif m.loss_entry.from_logits:  # the loss kernel applies the output activation
                threaded.bias_forward(Z, m.biases[l], Z, act.IDENTITY)
            else:
                threaded.bias_forward(Z, m.biases[l], self.O[:n], m.output_code)
        return self.Z[-1][:n]

    def hidden_forward(self, h: int, n: int, step: int | None, rows: np.ndarray | None) -> None:
        """Hidden layer h after its GEMM: bias → [norm] → activation → [dropout] → [+ skip] into A[h + 1]."""
        m = self.model
        Z, H, A = self.Z[h][:n], self.H[h][:n], self.A[h + 1][:n]
        if m.has_norm(h):  # norm and activation in one pass
            layers.norm_forward(Z, m.biases[h], m.gains[h], m.shifts[h], H, self.stats[h][:n], self._scratch,
                                m.hidden_codes[h])
        else:
            threaded.bias_forward(Z, m.biases[h], H, m.hidden_codes[h])
        rate = m.dropout[h]
        self.dropped[h] = step is not None and rate > 0
        if self.dropped[h]:
            key = np.uint64(layers.dropout_key(np.uint64(m.seed), np.uint64(step), np.uint64(h)))
            layers.dropout_forward(H, self.A[h][:n], A, self.keep[h][:n], rows, key, dropout_threshold(rate),
                                   m.dtype.type(1.0 / (1.0 - rate)), m.skips[h])
        elif m.skips[h]:
            layers.residual_forward(H, self.A[h][:n], A)
        elif self.A[h + 1] is not self.H[h]:  # dropout off (evaluation, prediction): the output is H itself
            layers.copy_rows(H, A)

    def forward_loss(self, n: int, targets: np.ndarray, weights: np.ndarray, scale: float, step: int | None = None,
                     rows: np.ndarray | None = None) -> float:
        """Forward pass and loss: returns the weighted loss SUM Σ w_i·ℓ_i over the n rows and leaves dZ_L·scale for
        backward. ``weights``: (≥ n,) float64, the rows' weights (ones for an unweighted job). ``step``, ``rows``:
        dropout's global step and row indices (training); None: no dropout."""
        m = self.model
        Z = self.forward(n, step, rows)
        dZ = self.delta(0, n, m.sizes[-1])
        return m.loss_entry.kernel(Z, self.O[:n], targets[:n], weights[:n], scale, dZ, m.output_code)

    def forward_outputs(self, n: int) -> np.ndarray:
        """Forward pass and output activation; returns O (n, k), a view into this workspace."""
        m = self.model
        Z = self.forward(n)
        O = self.O[:n]
        m.loss_entry.outputs(Z, O, self._zero_bias)
        return O

    def backward(self, n: int, grads: np.ndarray) -> Iterator[tuple[int, np.ndarray]]:
        """Backpropagate the delta left by :meth:`forward_loss`, writing gradients into ``grads``.

        Yields (l, dZ_l) after layer l's gradients are complete (l = L−1 … 0; a hidden layer's norm gain and shift
        are complete before its W and b), so the caller can launch the allreduce of every message that has just
        filled; dZ_l (n, fan_out) is valid until the next iteration. Per layer:
        dW_l = A_{l−1}ᵀ dZ_l (BLAS, straight into the grads view); db_l = Σ_rows dZ_l;
        dA_{l−1} = dZ_l W_lᵀ (BLAS) [+ ∂loss/∂A_l, the skip's share]; then hidden layer l−1 backward
        (:meth:`hidden_backward`) to dZ_{l−1}. With embeddings, layer 0 also forms dA_0 = dZ_0 W_0ᵀ and scatter-adds
        its embedding columns into the tables' gradient rows before layer 0 is yielded.
        """
        m = self.model
        dWs, dbs = m.views(grads)
        dGs, dBs = m.norm_views(grads)
        dZ, free = self.delta(0, n, m.sizes[-1]), 1  # free: the ping-pong buffer dZ is not in
        summed = False  # whether db_l was formed with dZ_l (the plain hidden layer's fused backward)
        for l in reversed(range(m.n_layers)):
            np.matmul(self.A[l][:n].T, dZ, out=dWs[l])
            if not summed:
                threaded.column_sums(dZ, dbs[l])
            done = dZ
            if l > 0:
                dA = self.delta(free, n, m.sizes[l])
                np.matmul(dZ, m.weights[l].T, out=dA)
                if l < m.n_layers - 1 and m.skips[l]:
                    layers.residual_backward(dA, self.saved(n, m.sizes[l]))
                dZ, summed = self.hidden_backward(l - 1, n, dA, dGs[l - 1], dBs[l - 1], dbs[l - 1])
                free = 1 - free
            elif m.embeddings:
                dA = self.delta(free, n, m.sizes[0])
                np.matmul(dZ, m.weights[0].T, out=dA)
                if self.input_gradient is not None:
                    self.input_gradient[:n] = dA
                start, stop = m.embedding_range()
                grads[start:stop] = 0.0
                layers.embedding_backward(dA, self.codes[:n], m.n_numeric, m.embedding_offsets, m.embedding_widths,
                                          grads)
            yield l, done

    def saved(self, n: int, width: int) -> np.ndarray:
        """A contiguous (n, width) view of the buffer holding the skip's share of the gradient."""
        return self._saved[: n * width].reshape(n, width)

    def hidden_backward(self, h: int, n: int, D: np.ndarray, dgain: np.ndarray | None,
                        dshift: np.ndarray | None, db: np.ndarray) -> tuple[np.ndarray, bool]:
        """∂loss/∂A_{h+1} in D (n, m) → dZ_h in D; the norm's gain and shift gradients into ``dgain``, ``dshift``.
        Returns (D, whether the bias gradient ``db`` (m,) = Σ_rows dZ_h is formed too: yes without norm, where
        the activation's backward and the sums are one pass). The skip's share of D is kept for :meth:`backward`."""
        m = self.model
        width = D.shape[1]
        if self.dropped[h]:
            layers.dropout_backward(D, self.saved(n, width), self.keep[h][:n], m.dtype.type(1.0 / (1.0 - m.dropout[h])),
                                    m.skips[h])
        elif m.skips[h]:
            layers.copy_rows(D, self.saved(n, width))
        if not m.has_norm(h):
            threaded.backward_sums(self.Z[h][:n], self.H[h][:n], D, m.hidden_codes[h], db, self._block_sums)
            return D, True
        if self.norm_input is not None:
            self.norm_input[h][:n] = D
        layers.norm_backward(self.Z[h][:n], self.stats[h][:n], m.gains[h], m.shifts[h], self.H[h][:n], D, dgain,
                             dshift, self._row_sums, m.hidden_codes[h])
        return D, False

    def preactivations(self, h: int, n: int) -> np.ndarray:
        """The input of hidden layer h's activation for the last forward pass, (n, m): Z, or the norm's
        N = g ⊙ (Z − μ)·r + β formed as the kernel forms it (a new array; for diagnostics, not the step)."""
        if self.pre[h] is not None:
            return self.pre[h][:n]
        m, dt = self.model, self.model.dtype
        mu, r = self.stats[h][:n, :1].astype(dt), self.stats[h][:n, 1:].astype(dt)
        return m.gains[h] * ((self.Z[h][:n] - mu) * r) + m.shifts[h]


def dropout_threshold(rate: float) -> np.uint32:
    """⌊p·2³²⌋ as uint32: a unit is kept when its 32 hash bits are at least this (P(keep) = 1 − p within 2⁻³²)."""
    return np.uint32(min(int(rate * 2.0**32), 2**32 - 1))


def model_from_job(job: Job, embeddings: list[tuple[str, int, int]] | None = None) -> MLP:
    """The job's model; ``embeddings``: (column, rows, width) of each categorical column's table (the data's)."""
    m = job.model
    return MLP(m.layers, activation=m.activation, loss=m.loss, dtype=m.dtype, seed=job.run.seed, init=m.init,
               output=m.output, huber_delta=m.huber_delta, norm=m.norm, dropout=m.dropout, residual=m.residual,
               embeddings=embeddings)


def check_weights(weights: np.ndarray, n: int, name: str) -> np.ndarray:
    """Row weights as float64 (n,): finite, ≥ 0 and not all zero, or a JobError naming ``name`` and the row."""
    w = weights.reshape(-1) if weights.ndim == 2 and weights.shape[1:] == (1,) else weights
    if w.shape != (n,):
        raise JobError(f"`{name}` must hold one weight per row, shape ({n},); got shape {weights.shape}")
    if w.dtype.kind not in "fiub":
        raise JobError(f"`{name}` must hold numbers; got dtype {w.dtype}")
    w = np.asarray(w, dtype=np.float64)
    bad = ~np.isfinite(w) | (w < 0)
    if bad.any():
        row = int(np.flatnonzero(bad)[0])
        raise JobError(f"`{name}` must hold finite weights ≥ 0; got {float(w[row])!r} in row {row}")
    if n and not w.any():
        raise JobError(f"`{name}` sum to zero: at least one row must weigh more than 0")
    with np.errstate(over="ignore"):
        total = float(np.sum(w))
    if not math.isfinite(total):
        raise JobError(f"`{name}` sum beyond the largest float64; scale them down (only their ratios matter)")
    return w
