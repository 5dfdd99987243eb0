"""The multilayer perceptron: flat parameter layout, initialisation, and the three GEMMs per layer.

All parameters live in one flat array ``params``. Layers are laid out *last layer first*
(``W_{L-1}, b_{L-1}, …, W_0, b_0``) because backward produces gradients in that order: after backward has
finished layer l, the gradient prefix ``grads[:end_of(l)]`` is complete and can go on the wire as one
contiguous message. ``weights[l]`` (fan_in, fan_out) and ``biases[l]`` (fan_out,) are views into ``params``.
"""

from __future__ import annotations

import math
from collections.abc import Iterator

import numpy as np
from shardmill.config import Job, default, model_spec
from shardmill.errors import JobError
from shardmill.kernels import activations as act
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
    """

    def __init__(self, layers: list[int], activation: str | list[str] = default("model.activation"),
                 loss: str = default("model.loss"), dtype: str = default("model.dtype"), seed: int = 0,
                 init: str = default("model.init"), output: str = default("model.output"),
                 huber_delta: float = default("model.huber_delta")) -> None:
        # The same checks and messages as the job file's [model] table (config.model_spec).
        spec = model_spec({"layers": list(layers), "activation": activation, "loss": loss, "dtype": dtype,
                           "init": init, "output": output, "huber_delta": huber_delta})
        self.sizes = spec.layers
        self.activations = spec.activation
        self.loss = spec.loss
        self.dtype = np.dtype(spec.dtype)
        self.huber_delta = spec.huber_delta
        # the loss's kernels, targets, metrics and labels, with its parameters (huber's δ) fixed
        self.loss_entry = LOSSES[self.loss].bound(huber_delta=spec.huber_delta)
        self.output = self.loss_entry.output if spec.output == "auto" else spec.output
        self.init = spec.init
        if self.init == "auto":
            self.init = "he" if relu_family_only(self.activations) else "glorot"
        self.hidden_codes = [ACTIVATIONS[a].code for a in self.activations]
        # the code the forward pass applies to the output layer: the identity where the loss kernel applies it
        self.output_code = act.IDENTITY if self.loss_entry.from_logits else ACTIVATIONS[self.output].code

        # Layout: last layer first, W before b within a layer.
        self.slices: list[tuple[int, int]] = [(0, 0)] * self.n_layers  # (start, stop) of layer l in params
        offset = 0
        for l in reversed(range(self.n_layers)):
            size = self.sizes[l] * self.sizes[l + 1] + self.sizes[l + 1]
            self.slices[l] = (offset, offset + size)
            offset += size
        self._params = np.zeros(offset, dtype=self.dtype)
        self.weights, self.biases = self.views(self._params)
        self._initialise(seed)
        self._workspaces: dict[int, Workspace] = {}

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

    def names(self) -> list[str]:
        """Tensor names in checkpoint order: W0, b0, W1, b1, …"""
        return [f"{kind}{l}" for l in range(self.n_layers) for kind in ("W", "b")]

    def named(self, flat: np.ndarray) -> dict[str, np.ndarray]:
        """{"W0": view, "b0": view, …} of a flat array with the params layout."""
        ws, bs = self.views(flat)
        out: dict[str, np.ndarray] = {}
        for l in range(self.n_layers):
            out[f"W{l}"], out[f"b{l}"] = ws[l], bs[l]
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

    def workspace(self, rows: int) -> Workspace:
        """Buffers for batches of up to ``rows`` rows, allocated once and reused."""
        if rows not in self._workspaces:
            self._workspaces[rows] = Workspace(self, rows)
        return self._workspaces[rows]

    def check_inputs(self, X: np.ndarray, name: str = "X") -> None:
        if X.ndim != 2 or X.shape[1] != self.sizes[0]:
            raise JobError(f"`{name}` must have shape (n, {self.sizes[0]}); got {X.shape}")

    def check_targets(self, y: np.ndarray, n: int, name: str = "y") -> np.ndarray:
        """Validate targets for this model's loss and return them in the dtype the kernels take."""
        return self.loss_entry.check_targets(y, n, self.sizes[-1], self.dtype, name)

    def loss_and_grad(self, X: np.ndarray, y: np.ndarray,
                      weights: np.ndarray | None = None) -> tuple[float, np.ndarray]:
        """Mean loss over the n rows of X and its gradient, flat in the params layout (a new array).

        ``weights``: one weight ≥ 0 per row, (n,); the loss is then Σ w·ℓ / Σ w (as a weighted job trains).
        """
        X = np.asarray(X)
        self.check_inputs(X)
        targets = self.check_targets(np.asarray(y), X.shape[0])
        n = X.shape[0]
        w = np.ones(n) if weights is None else check_weights(np.asarray(weights), n, "weights")
        total_weight = float(n) if weights is None else math.fsum(w)
        ws = self.workspace(n)
        ws.inputs[:n] = X
        grads = np.empty_like(self._params)
        total = ws.forward_loss(n, targets, w, 1.0 / total_weight)
        for _ in ws.backward(n, grads):
            pass
        return total / total_weight, grads

    def predict(self, X: np.ndarray, batch: int = 4096) -> np.ndarray:
        """Outputs after the output activation, (n, k) in the model's dtype (probabilities for cross-entropy)."""
        X = np.asarray(X)
        self.check_inputs(X)
        n = X.shape[0]
        out = np.empty((n, self.sizes[-1]), dtype=self.dtype)
        rows = max(1, min(batch, n))
        ws = self.workspace(rows)
        for lo in range(0, n, rows):
            m = min(rows, n - lo)
            ws.inputs[:m] = X[lo:lo + m]
            out[lo:lo + m] = ws.forward_outputs(m)
        return out


class Workspace:
    """Activations, pre-activations and deltas for batches of up to ``rows`` rows, allocated once.

    ``inputs`` (rows, d0) is the batch buffer the data layer gathers into. Nothing here allocates per step:
    every GEMM writes with ``out=`` into these buffers or into the gradient views.
    """

    def __init__(self, model: MLP, rows: int) -> None:
        self.model = model
        self.rows = rows
        dt, sizes, L = model.dtype, model.sizes, model.n_layers
        self.inputs = np.zeros((rows, sizes[0]), dtype=dt)
        self.Z = [np.zeros((rows, sizes[l + 1]), dtype=dt) for l in range(L)]
        self.A = [self.inputs]
        for l in range(L - 1):  # hidden outputs; identity layers reuse their pre-activations
            self.A.append(self.Z[l] if model.hidden_codes[l] == act.IDENTITY else np.zeros_like(self.Z[l]))
        self.O = np.zeros((rows, sizes[-1]), dtype=dt)
        width = max(sizes[1:])
        self._delta = (np.zeros(rows * width, dtype=dt), np.zeros(rows * width, dtype=dt))
        self._zero_bias = np.zeros(sizes[-1], dtype=dt)

    def delta(self, which: int, n: int, width: int) -> np.ndarray:
        """A contiguous (n, width) view of ping-pong delta buffer ``which``."""
        return self._delta[which][: n * width].reshape(n, width)

    def forward(self, n: int) -> np.ndarray:
        """Z_l = A_{l−1} @ W_l (BLAS), then A_l = f(Z_l + b_l); returns the output logits Z_L (n, k)."""
        m = self.model
        for l in range(m.n_layers):
            Z = self.Z[l][:n]
            np.matmul(self.A[l][:n], m.weights[l], out=Z)
            if l < m.n_layers - 1:
                act.bias_forward(Z, m.biases[l], self.A[l + 1][:n], m.hidden_codes[l])
            elif m.loss_entry.from_logits:  # the loss kernel applies the output activation
                act.bias_forward(Z, m.biases[l], Z, act.IDENTITY)
            else:
                act.bias_forward(Z, m.biases[l], self.O[:n], m.output_code)
        return self.Z[-1][:n]

    def forward_loss(self, n: int, targets: np.ndarray, weights: np.ndarray, scale: float) -> float:
        """Forward pass and loss: returns the weighted loss SUM Σ w_i·ℓ_i over the n rows and leaves dZ_L·scale for
        backward. ``weights``: (≥ n,) float64, the rows' weights (ones for an unweighted job)."""
        m = self.model
        Z = self.forward(n)
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

        Yields (l, dZ_l) after layer l's gradients are complete (l = L−1 … 0), so the caller can launch the
        allreduce of every message that has just filled; dZ_l (n, fan_out) is valid until the next iteration.
        Per layer:
        dW_l = A_{l−1}ᵀ dZ_l (BLAS, straight into the grads view); db_l = Σ_rows dZ_l;
        dA_{l−1} = dZ_l W_lᵀ (BLAS); dZ_{l−1} = f'(Z_{l−1}) ⊙ dA_{l−1}.
        """
        m = self.model
        dWs, dbs = m.views(grads)
        which = 0
        for l in reversed(range(m.n_layers)):
            dZ = self.delta(which, n, m.sizes[l + 1])
            np.matmul(self.A[l][:n].T, dZ, out=dWs[l])
            act.column_sums(dZ, dbs[l])
            if l > 0:
                dA = self.delta(1 - which, n, m.sizes[l])
                np.matmul(dZ, m.weights[l].T, out=dA)
                act.backward(self.Z[l - 1][:n], self.A[l][:n], dA, m.hidden_codes[l - 1])
                which = 1 - which
            yield l, dZ


def model_from_job(job: Job) -> MLP:
    m = job.model
    return MLP(m.layers, activation=m.activation, loss=m.loss, dtype=m.dtype, seed=job.run.seed, init=m.init,
               output=m.output, huber_delta=m.huber_delta)


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
    return w
