"""The loss and activation tables (``shardmill.model.losses``, ``shardmill.model.activations``): each entry's numpy
reference against an outside formula (scipy, scikit-learn, the published definitions), the Numba kernels against the
entry's reference, the entries against each other and the config, and docs/models.md against the generated tables."""

from __future__ import annotations

import math
from pathlib import Path

import numpy as np
import pytest
import scipy.special
from shardmill import config
from shardmill.docblocks import block_between
from shardmill.kernels import activations as activation_kernels
from shardmill.kernels import losses as loss_kernels
from shardmill.model import activations, losses
from shardmill.model.activations import ACTIVATIONS, OUTPUTS
from shardmill.model.losses import LOSSES
from sklearn.metrics import accuracy_score, log_loss, mean_squared_error

DOCS = Path(__file__).resolve().parents[1] / "docs" / "models.md"

PUBLISHED = {  # f(z) from outside the project, in float64; the source beside each entry
    "identity": lambda z: z,  # common practice: f(z) = z
    "sigmoid": scipy.special.expit,  # scipy.special.expit, the logistic function
    "tanh": lambda z: np.sinh(z) / np.cosh(z),  # definition: tanh = sinh / cosh
    "relu": lambda z: np.where(z > 0, z, 0.0),  # Nair & Hinton 2010: max(0, z)
    "leaky_relu": lambda z: np.where(z > 0, z, 0.01 * z),  # Maas et al. 2013, slope 0.01
    "gelu": lambda z: 0.5 * z * (1 + np.tanh(np.sqrt(2 / np.pi) * (z + 0.044715 * z**3))),  # Hendrycks & Gimpel 2016
    "softplus": lambda z: np.logaddexp(0.0, z),  # numpy.logaddexp: log(e^0 + e^z)
    "softmax": lambda z: scipy.special.softmax(z, axis=1),  # scipy.special.softmax
    "exp": lambda z: np.power(np.e, z),  # definition: e^z (np.e's one rounding moves it by |z|·2⁻⁵³ at most)
}


def _wide(rows: int = 40, cols: int = 25, seed: int = 0) -> np.ndarray:
    """Pre-activations over a wide range, (rows, cols) float64, with the edge values ±700, ±1e-8 and 0."""
    z = np.random.default_rng(seed).normal(0.0, 6.0, size=rows * cols)
    z[:8] = [-700.0, -100.0, -1e-8, 0.0, 1e-8, 100.0, 700.0, -0.0]
    return z.reshape(rows, cols)


def test_every_activation_has_an_outside_reference_here() -> None:
    # convention: an entry added to the table needs its outside reference in this file
    assert set(PUBLISHED) == set(OUTPUTS)


@pytest.mark.parametrize("name", list(OUTPUTS))
def test_activation_reference_is_the_published_formula(name: str) -> None:
    z = _wide()
    if name == "tanh":  # sinh and cosh overflow beyond |z| ≈ 710 / 2; tanh is ±1 to double precision long before
        z = np.clip(z, -300.0, 300.0)
    got = OUTPUTS[name].forward(z)
    # the published formula (source beside each entry of PUBLISHED); softmax's rows normalise exp(z − max)
    np.testing.assert_allclose(got, PUBLISHED[name](z), rtol=1e-13, atol=1e-300)


def test_gelu_reference_is_close_to_the_exact_gelu() -> None:
    z = np.linspace(-8.0, 8.0, 1601)
    exact = 0.5 * z * (1.0 + scipy.special.erf(z / np.sqrt(2.0)))  # Hendrycks & Gimpel 2016: x·Φ(x)
    # from memory: the tanh approximation stays within about 5e-4 of x·Φ(x)
    np.testing.assert_allclose(ACTIVATIONS["gelu"].forward(z), exact, atol=1e-3)


def test_softplus_reference_is_log1p_of_exp() -> None:
    z = np.linspace(-30.0, 30.0, 601)
    # definition: softplus(z) = log(1 + e^z) (Dugas et al. 2001), evaluated where e^z does not overflow
    np.testing.assert_allclose(ACTIVATIONS["softplus"].forward(z), np.log1p(np.exp(z)), rtol=1e-14)


@pytest.mark.parametrize("name", list(ACTIVATIONS))
def test_activation_kernel_agrees_with_its_entry(name: str) -> None:
    entry = ACTIVATIONS[name]
    assert activation_kernels.code_of(name) == entry.code  # the kernels' own dispatch table
    Z = _wide(seed=1)
    A = np.empty_like(Z)
    activation_kernels.bias_forward(Z, np.zeros(Z.shape[1]), A, entry.code)
    # float64 rounding: libm (Numba) and numpy may differ by an ulp or two per operation; GELU's 1 + tanh cancels
    # for negative z, so its error is an ulp of the terms (|z| ≲ 30 here), not of the small result
    atol = 30 * np.finfo(np.float64).eps if name == "gelu" else 1e-300
    np.testing.assert_allclose(A, entry.forward(Z), rtol=1e-14, atol=atol)


def test_softmax_kernel_agrees_with_its_entry() -> None:
    Z = _wide(seed=2)
    O = np.empty_like(Z)
    loss_kernels.softmax_rows(Z, O)
    # float64 rounding (the same operations in the same order)
    np.testing.assert_allclose(O, OUTPUTS["softmax"].forward(Z), rtol=1e-14, atol=1e-300)


def test_relu_family_and_health_rules() -> None:
    # He et al. 2015 derive their initialisation for rectifiers; saturation is a property of bounded activations
    assert {n for n, e in ACTIVATIONS.items() if e.relu_family} == {"relu", "leaky_relu", "gelu", "softplus"}
    assert {n for n, e in ACTIVATIONS.items() if e.watch_saturation} == {"sigmoid", "tanh"}
    assert {n for n, e in ACTIVATIONS.items() if e.watch_dead} == {"relu", "leaky_relu"}
    assert activations.relu_family_only(["relu", "gelu"]) and not activations.relu_family_only(["relu", "tanh"])
    assert not activations.relu_family_only([])


def _case(name: str, n: int = 60, k: int = 4, seed: int = 3):
    """Logits Z (n, k) float64 and targets of the loss's kind."""
    rng = np.random.default_rng(seed)
    Z = rng.normal(0.0, 2.0, size=(n, k))
    targets = LOSSES[name].synthetic_targets(rng, n, k, np.float64)
    return Z, targets


def _outputs(name: str, Z: np.ndarray) -> np.ndarray:
    """The outputs after the loss's implied output activation, from its entry's numpy reference."""
    return OUTPUTS[LOSSES[name].output].forward(Z)


def test_cross_entropy_reference_is_scikit_learns_log_loss() -> None:
    Z, y = _case("softmax_cross_entropy")
    P = _outputs("softmax_cross_entropy", Z)
    got = LOSSES["softmax_cross_entropy"].reference(P, y).mean()
    # scikit-learn log_loss: mean over rows of −log p_y
    assert got == pytest.approx(log_loss(y, P, labels=list(range(P.shape[1]))), rel=1e-12)


def test_binary_cross_entropy_reference_is_scikit_learns_log_loss_per_output() -> None:
    Z, T = _case("binary_cross_entropy")
    P = _outputs("binary_cross_entropy", Z)
    got = LOSSES["binary_cross_entropy"].reference(P, T).mean()
    # scikit-learn log_loss of each output column (binary), summed over the k outputs as the row loss sums them
    expected = sum(log_loss(T[:, j], P[:, j], labels=[0, 1]) for j in range(T.shape[1]))
    assert got == pytest.approx(expected, rel=1e-12)


def test_squared_error_reference_is_half_k_times_scikit_learns_mse() -> None:
    Z, T = _case("squared_error")
    got = LOSSES["squared_error"].reference(Z, T).mean()
    # scikit-learn mean_squared_error averages over all n·k values; the row loss is ½ Σ over k
    assert got == pytest.approx(0.5 * T.shape[1] * mean_squared_error(T, Z), rel=1e-12)


@pytest.mark.parametrize("name", list(LOSSES))
def test_metric_reference_is_scikit_learns(name: str) -> None:
    entry = LOSSES[name]
    Z, targets = _case(name, seed=4)
    o = _outputs(name, Z)
    got = entry.metric_reference(o, targets)
    if name == "softmax_cross_entropy":
        expected = accuracy_score(targets, o.argmax(axis=1))  # scikit-learn accuracy_score
    elif name == "binary_cross_entropy":
        expected = accuracy_score((targets > 0.5).ravel(), (o > 0.5).ravel())  # scikit-learn, per output
    else:
        expected = math.sqrt(mean_squared_error(targets, o))  # scikit-learn mean_squared_error, then √
    assert got == pytest.approx(expected, rel=1e-12)


@pytest.mark.parametrize("output", ["identity", "tanh", "sigmoid"])
@pytest.mark.parametrize("name", list(LOSSES))
def test_loss_kernel_and_summary_agree_with_the_references(name: str, output: str) -> None:
    entry = LOSSES[name]
    if entry.from_logits and output != "identity":
        pytest.skip("the loss implies its output activation")
    Z, targets = _case(name, seed=5)
    n, k = Z.shape
    output = entry.output if entry.from_logits else output
    code = activation_kernels.IDENTITY if entry.from_logits else ACTIVATIONS[output].code
    O, dZ = np.empty_like(Z), np.empty_like(Z)
    if not entry.from_logits:  # the forward pass applies the output activation before the kernel
        activation_kernels.bias_forward(Z, np.zeros(k), O, code)
    total = entry.kernel(Z, O, targets, np.ones(Z.shape[0]), 1.0, dZ, code)
    o = OUTPUTS[output].forward(Z)
    # float64 rounding: the kernel's outputs and loss against the entry's numpy references
    np.testing.assert_allclose(O, o, rtol=1e-14)
    assert total == pytest.approx(entry.reference(o, targets).sum(), rel=1e-12)
    sums = np.array([total, entry.quality_sum(O, targets), n])
    summary = entry.summary(sums, k)
    assert list(summary) == ["loss", entry.metric]
    assert summary["loss"] == pytest.approx(entry.reference(o, targets).mean(), rel=1e-12)
    assert summary[entry.metric] == pytest.approx(entry.metric_reference(o, targets), rel=1e-12)


@pytest.mark.parametrize("name", [n for n, e in LOSSES.items() if e.from_logits])
def test_outputs_of_logits_are_the_implied_activation(name: str) -> None:
    entry = LOSSES[name]
    Z, _ = _case(name, seed=6)
    O = np.empty_like(Z)
    entry.outputs(Z, O, np.zeros(Z.shape[1]))
    # float64 rounding: the output kernel against the implied activation's reference
    np.testing.assert_allclose(O, OUTPUTS[entry.output].forward(Z), rtol=1e-14)


def test_label_rules() -> None:
    O = np.array([[0.1, 0.7, 0.2], [0.6, 0.3, 0.1]])
    # common practice: the class of the largest probability; an output above ½ is the positive class
    assert LOSSES["softmax_cross_entropy"].labels(O).tolist() == [1, 0]
    assert LOSSES["binary_cross_entropy"].labels(O).tolist() == [[0, 1, 0], [1, 0, 0]]
    assert LOSSES["squared_error"].labels is None
    assert losses.CLASSIFIER_LOSSES == ("softmax_cross_entropy", "binary_cross_entropy")


@pytest.mark.parametrize("name", list(LOSSES))
def test_entries_fit_the_kernels_and_the_schema(name: str) -> None:
    # convention: one description per loss; the entry, the kernels' dispatch and the schema agree
    entry = LOSSES[name]
    assert loss_kernels.CODES[name] == entry.code
    assert entry.output in OUTPUTS
    assert set(entry.best_metrics) <= set(config.BEST_METRICS)
    assert entry.output_choosable == (not entry.from_logits)
    for dtype in (np.float32, np.float64):
        targets = entry.synthetic_targets(np.random.default_rng(0), 10, 3, dtype)
        assert entry.check_targets(targets, 10, 3, np.dtype(dtype)).shape == targets.shape
    assert config.LOSSES == tuple(LOSSES) and config.ACTIVATIONS == tuple(ACTIVATIONS)


def test_table_labels_become_integers_only_for_class_labels() -> None:
    y = np.array([1.0, 0.0, 2.0])
    assert LOSSES["softmax_cross_entropy"].table_labels(y).dtype == np.int64
    assert LOSSES["softmax_cross_entropy"].table_labels(np.array([1.5, 0.0])).dtype == np.float64
    assert LOSSES["squared_error"].table_labels(y).dtype == np.float64


@pytest.mark.parametrize("module", [activations, losses], ids=["activations", "losses"])
def test_docs_tables_are_the_generated_ones(module) -> None:
    text = DOCS.read_text()
    assert text.count(module.DOCS_BEGIN) == 1 and text.count(module.DOCS_END) == 1
    block = block_between(text, module.DOCS_BEGIN, module.DOCS_END)
    assert block == module.markdown(), (
        "docs/models.md's tables are stale; run: python -c \"from shardmill.model.losses import write_docs; "
        "write_docs('docs/models.md')\"")
