"""The activation layer (``type = "activation"``): an activation on its own after a norm, a pooling or a dropout.

Outside references, named beside each check: onnxruntime's Relu, Tanh, Sigmoid,
LeakyRelu and Softplus operators (ONNX operator documentation,
https://onnx.ai/onnx/operators/) for the forward pass; ``jax.grad`` in float64
(Bradbury et al., JAX, https://github.com/jax-ml/jax) of a dense, batch norm
(Ioffe & Szegedy 2015, Algorithm 1), activation, dense network written again
from the definitions, for the slopes.
"""

from __future__ import annotations

from pathlib import Path
from typing import Any, Callable

import numpy as np
import pytest

jax = pytest.importorskip("jax")
jax.config.update("jax_enable_x64", True)
import jax.numpy as jnp  # noqa: E402
import onnx  # noqa: E402
import onnxruntime as ort  # noqa: E402
from onnx import TensorProto, helper  # noqa: E402

from stepper.core.activations import ACTIVATIONS, leaky_relu  # noqa: E402
from stepper.core.layers import ActivationLayer, BatchNorm, Conv, Dense, Flatten, Grid  # noqa: E402
from stepper.core.network import Network  # noqa: E402
from stepper.core.numeric import numeric_slopes  # noqa: E402

ELEMENTWISE = ["relu", "tanh", "sigmoid", "leaky_relu", "softplus"]
#: ONNX operator of each activation (ONNX operator documentation).
OPS = {"relu": "Relu", "tanh": "Tanh", "sigmoid": "Sigmoid", "leaky_relu": "LeakyRelu", "softplus": "Softplus"}
#: The same functions in jax (jax.nn; leaky ReLU's 0.01 as Maas, Hannun & Ng 2013 use it).
JAX: dict[str, Callable[[Any], Any]] = {
    "relu": jax.nn.relu, "tanh": jnp.tanh, "sigmoid": jax.nn.sigmoid,
    "leaky_relu": lambda z: jax.nn.leaky_relu(z, 0.01), "softplus": jax.nn.softplus,
}


def _onnxruntime(op: str, X: np.ndarray, **attributes: Any) -> np.ndarray:
    """One node of ``op`` run by onnxruntime in float32 (its CPU kernels of these operators)."""
    node = helper.make_node(op, ["x"], ["y"], **attributes)
    graph = helper.make_graph([node], "act", [helper.make_tensor_value_info("x", TensorProto.FLOAT, list(X.shape))],
                              [helper.make_tensor_value_info("y", TensorProto.FLOAT, None)])
    model = helper.make_model(graph, opset_imports=[helper.make_opsetid("", 17)])
    model.ir_version = 8
    session = ort.InferenceSession(model.SerializeToString(), providers=["CPUExecutionProvider"])
    return np.asarray(session.run(["y"], {"x": X.astype(np.float32)})[0], dtype=np.float64)


@pytest.mark.parametrize("name", ELEMENTWISE)
@pytest.mark.parametrize("shape", [(7,), (2, 3, 4)], ids=["flat", "shaped"])
def test_forward_matches_onnxruntime(name: str, shape: tuple[int, ...]) -> None:
    layer = ActivationLayer(shape, ACTIVATIONS[name])
    X = np.random.default_rng(1).normal(0.0, 2.0, (5, layer.n_in))
    X32 = X.astype(np.float32).astype(np.float64)  # the same inputs the runtime sees
    out, _ = layer.forward({}, X32)
    extra = {"alpha": 0.01} if name == "leaky_relu" else {}
    # onnxruntime's operator of the same name, on the shaped tensor (N, *shape); float32's 1e-6 relative.
    reference = _onnxruntime(OPS[name], X32.reshape((5,) + shape), **extra).reshape(5, -1)
    np.testing.assert_allclose(out, reference, rtol=1e-6, atol=1e-7)


def test_softmax_is_not_an_activation_layer() -> None:
    with pytest.raises(ValueError, match="elementwise"):
        ActivationLayer((3,), ACTIVATIONS["softmax"])


# -- slopes against jax.grad ------------------------------------------------------------------

EPS = 1e-5


def _network(name: str, loss: str = "mean_squared_error", last: str | None = None) -> Network:
    """dense 3->5 (identity), batch_norm, activation ``name``, dense 5->2 (identity)[, activation ``last``]."""
    layers: list[Any] = [Dense(3, 5, ACTIVATIONS["identity"]), BatchNorm((5,), 0.9, EPS),
                         ActivationLayer((5,), ACTIVATIONS[name]), Dense(5, 2, ACTIVATIONS["identity"])]
    if last is not None:
        layers.append(ActivationLayer((2,), ACTIVATIONS[last]))
    return Network(3, layers, loss)


def _jax_cost(name: str, loss: str, last: str | None, X: np.ndarray, Y: np.ndarray) -> Callable[..., Any]:
    def cost(W1: Any, b1: Any, scale: Any, shift: Any, W2: Any, b2: Any) -> Any:
        Z = X @ W1 + b1
        mean = jnp.mean(Z, axis=0)
        var = jnp.mean((Z - mean) ** 2, axis=0)  # the batch's biased variance (Ioffe & Szegedy 2015, Alg. 1)
        H = JAX[name]((Z - mean) / jnp.sqrt(var + EPS) * scale + shift)
        out = H @ W2 + b2
        if last is not None:
            out = JAX[last](out)
        if loss == "binary_cross_entropy":
            return -jnp.mean(Y * jnp.log(out) + (1.0 - Y) * jnp.log1p(-out))
        return jnp.mean((out - Y) ** 2)

    return cost


@pytest.mark.parametrize("name", ELEMENTWISE)
@pytest.mark.parametrize("loss,last", [("mean_squared_error", None), ("binary_cross_entropy", "sigmoid")],
                         ids=["mse", "sigmoid-bce"])
def test_slopes_match_jax_grad(name: str, loss: str, last: str | None) -> None:
    net = _network(name, loss, last)
    rng = np.random.default_rng(2)
    theta = rng.normal(size=net.n_params)
    X = rng.normal(size=(12, 3))
    Y = rng.uniform(0.1, 0.9, (12, 2)) if last else rng.normal(size=(12, 2))
    cost, grads = net.cost_and_slopes(theta, X, Y)
    p = net.views(theta)
    args = (p[0]["W"], p[0]["b"], p[1]["scale"], p[1]["shift"], p[3]["W"], p[3]["b"])
    fn = _jax_cost(name, loss, last, X, Y)
    # jax.grad in float64 of the same network written from its definitions: 1e-10 relative.
    reference = jax.grad(fn, argnums=tuple(range(6)))(*args)
    g = net.views(grads)
    ours = (g[0]["W"], g[0]["b"], g[1]["scale"], g[1]["shift"], g[3]["W"], g[3]["b"])
    # The first bias's slope is 0 up to rounding (the batch norm takes the mean away): entries that small
    # are compared absolutely, at 1e-13 of the largest slope (a relative error means nothing at zero).
    floor = 1e-13 * max(float(np.max(np.abs(np.asarray(r)))) for r in reference)
    for mine, theirs in zip(ours, reference):
        np.testing.assert_allclose(mine, np.asarray(theirs), rtol=1e-10, atol=floor)
    assert cost == pytest.approx(float(fn(*args)), rel=1e-12)
    if last is not None:
        assert net.fused is not None  # a sigmoid activation layer last pairs with its cross-entropy, from Z


# -- numeric slopes and kinks -----------------------------------------------------------------


def _conv_network() -> Network:
    """conv2d (identity) over 1x5x5, batch_norm, activation relu, flatten, dense: the channel route."""
    conv = Conv((1, 5, 5), 2, Grid((5, 5), (3, 3), (1, 1), ((0, 0), (0, 0))), ACTIVATIONS["identity"])
    return Network(25, [conv, BatchNorm((2, 3, 3), 0.9, EPS), ActivationLayer((2, 3, 3), ACTIVATIONS["relu"]),
                        Flatten((2, 3, 3)), Dense(18, 2, ACTIVATIONS["identity"])], "mean_squared_error",
                   input_shape=(1, 5, 5))


def _near_kink(net: Network, theta: np.ndarray, X: np.ndarray, bn: int) -> int:
    """Move batch norm ``bn``'s first shift so one entry of its output sits 1e-9 above ReLU's kink;
    returns the flat index of that shift."""
    out = net.forward(theta, X)[bn][0]
    block = net.layout.find_block(bn, "shift")
    per_channel = out.shape[1] // block.size
    theta[block.start] -= out[0, :per_channel].min() - 1e-9 if per_channel > 1 else out[0, 0] - 1e-9
    return block.start


@pytest.mark.parametrize("make,bn", [(lambda: _network("relu"), 1), (_conv_network, 1)], ids=["flat", "channels"])
def test_central_numeric_slopes_agree_and_relu_kinks_are_flagged(make: Callable[[], Network], bn: int) -> None:
    net = make()
    rng = np.random.default_rng(4)
    theta = rng.normal(size=net.n_params)
    X = rng.normal(size=(10, net.n_inputs))
    Y = rng.normal(size=(10, 2))
    shift = _near_kink(net, theta, X, bn)
    _, grads = net.cost_and_slopes(theta, X, Y)
    num = numeric_slopes(net, theta, X, Y, "central")
    # Central differences agree with backpropagation to O(h^2) where no kink is straddled
    # (Nocedal & Wright 2006, section 8.1); 1e-6 relative is common practice, no published source.
    np.testing.assert_allclose(num.slopes[~num.kink], grads[~num.kink], rtol=1e-6, atol=1e-9)
    # The entry 1e-9 above the kink: a move of the shift by h = 6e-6 crosses it both ways, so the central
    # difference averages two pieces and differs from the analytic slope; it must be flagged, not judged.
    assert num.kink[shift]
    assert abs(num.slopes[shift] - grads[shift]) > 1e-4 * abs(grads[shift])
    assert num.kink.sum() < net.n_params // 2  # far from every kink, nothing else is flagged


def test_leaky_relu_other_slopes_keep_their_constant() -> None:
    layer = ActivationLayer((3,), leaky_relu(0.2))
    out, cache = layer.forward({}, np.array([[-1.0, 0.5, -2.0]]))
    np.testing.assert_allclose(out, [[-0.2, 0.5, -0.4]])  # max(z, 0.2 z), by hand
    _, dX = layer.backward({}, cache, np.ones((1, 3)))
    np.testing.assert_allclose(dX, [[0.2, 1.0, 0.2]])


# -- model files ----------------------------------------------------------------------------

MODEL = """\
name = "norm-then-relu"
loss = "mean_squared_error"
[data]
file = "data.csv"
inputs = ["a", "b", "c"]
targets = ["y"]
[init]
scheme = "he_uniform"
seed = 2
[[layers]]
units = 4
activation = "identity"
[[layers]]
type = "batch_norm"
[[layers]]
type = "activation"
activation = "relu"
[[layers]]
units = 1
activation = "identity"
"""


def _write(tmp_path: Path, text: str) -> Path:
    rng = np.random.default_rng(5)
    X = rng.normal(size=(24, 3))
    y = np.tanh(X @ [0.5, -1.0, 0.3])
    rows = ["a,b,c,y"] + [",".join(f"{v:.6f}" for v in (*x, t)) for x, t in zip(X, y)]
    (tmp_path / "data.csv").write_text("\n".join(rows) + "\n", encoding="utf-8")
    (tmp_path / "model.toml").write_text(text, encoding="utf-8")
    return tmp_path / "model.toml"


def test_a_model_file_layer_checks_runs_and_resumes(tmp_path: Path, capsys: pytest.CaptureFixture[str]) -> None:
    from stepper import cli
    from stepper.formats.model_file import load_setup

    model = _write(tmp_path, MODEL)
    layer = load_setup(model).network.layers[2]
    assert isinstance(layer, ActivationLayer) and layer.label == "activation 4 relu"
    assert cli.main(["check", str(model)]) == 0, capsys.readouterr().err
    ck = tmp_path / "ck.safetensors"
    assert cli.main(["run", str(model), "--steps", "30", "--save", str(ck)]) == 0, capsys.readouterr().err
    assert cli.main(["check", str(model), "--resume", str(ck)]) == 0, capsys.readouterr().err
    assert cli.main(["explain", str(model), "L4.W[0,0]", "--resume", str(ck)]) == 0, capsys.readouterr().err
    assert "L4.W[0,0]" in capsys.readouterr().out


@pytest.mark.parametrize("old,new,expected", [
    ('activation = "relu"', "", "layers[2].activation (L3): missing"),
    ('activation = "relu"', 'activation = "softmax"',
     "layers[2].activation (L3): unknown 'softmax' (expected one of: identity, sigmoid, tanh, relu, leaky_relu, "
     "softplus)"),
    ('activation = "relu"', "activation = 1", "layers[2].activation (L3): expected a string, got an integer"),
    ('activation = "relu"', 'activation = "relu"\nunits = 3',
     "layers[2].units (L3): an activation layer does not take this key (it takes: activation, type)"),
    ('activation = "relu"', 'function = "relu"',
     "layers[2].function (L3): unknown key (an activation layer takes: activation, type)"),
])
def test_a_bad_key_is_one_line_and_exit_2(tmp_path: Path, capsys: pytest.CaptureFixture[str], old: str, new: str,
                                          expected: str) -> None:
    from stepper import cli

    text = MODEL.replace('type = "activation"\n' + old, 'type = "activation"\n' + new)
    assert text != MODEL
    model = _write(tmp_path, text)
    assert cli.main(["check", str(model)]) == 2
    err = capsys.readouterr().err
    assert err == f"stepper: {model}: {expected}\n"


def test_a_sigmoid_layer_last_pairs_with_binary_cross_entropy_and_softmax_is_refused(
        tmp_path: Path, capsys: pytest.CaptureFixture[str]) -> None:
    from stepper import cli

    tail = '[[layers]]\ntype = "activation"\nactivation = "{}"\n'
    bce = MODEL.replace('"mean_squared_error"', '"binary_cross_entropy"') + tail.format("sigmoid")
    model = _write(tmp_path, bce)
    csv = (tmp_path / "data.csv").read_text(encoding="utf-8").splitlines()
    fixed = [csv[0]] + [",".join(r.split(",")[:3] + [str(int(float(r.split(",")[3]) > 0))]) for r in csv[1:]]
    (tmp_path / "data.csv").write_text("\n".join(fixed) + "\n", encoding="utf-8")
    assert cli.main(["check", str(model)]) == 0, capsys.readouterr().err
    capsys.readouterr()
    cce = MODEL.replace('"mean_squared_error"', '"categorical_cross_entropy"') + tail.format("tanh")
    model = _write(tmp_path, cce)
    assert cli.main(["check", str(model)]) == 2
    assert "it belongs to a dense output layer" in capsys.readouterr().err


def test_onnx_round_trip_of_a_model_file_network(tmp_path: Path, capsys: pytest.CaptureFixture[str]) -> None:
    from onnx_graphs import run_onnxruntime

    from stepper import cli
    from stepper.formats.model_file import load_setup

    # An epsilon float32 holds exactly (2^-10): ONNX stores float attributes as float32.
    # (Leaky ReLU's alpha is a float attribute too, so ReLU here: its forward is checked above.)
    model = _write(tmp_path, MODEL.replace('type = "batch_norm"', 'type = "batch_norm"\nepsilon = 0.0009765625'))
    out = tmp_path / "net.onnx"
    assert cli.main(["export", str(model), "--to", str(out), "--dtype", "float64"]) == 0, capsys.readouterr().err
    ops = [n.op_type for n in onnx.load(str(out)).graph.node]
    assert ops == ["Gemm", "BatchNormalization", "Relu", "Gemm", "Identity"]
    setup = load_setup(model)
    X = np.random.default_rng(8).normal(size=(9, 3))
    # onnxruntime runs the written graph: Stepper's evaluation forward (running statistics) gives the same.
    np.testing.assert_allclose(run_onnxruntime(out, X), setup.network.at(False).predict(setup.theta0, X),
                               rtol=1e-12, atol=1e-13)


def test_torch_layout_counts_the_layer_as_one_module(tmp_path: Path, capsys: pytest.CaptureFixture[str]) -> None:
    from safetensors.numpy import load_file

    from stepper import cli

    model = _write(tmp_path, MODEL)
    out = tmp_path / "state.safetensors"
    assert cli.main(["export", str(model), "--to", str(out), "--layout", "torch"]) == 0, capsys.readouterr().err
    # nn.Sequential(Linear, BatchNorm1d, ReLU, Linear): the ReLU holds nothing and takes index 2 (torch.nn docs).
    assert sorted(load_file(str(out))) == sorted(["0.weight", "0.bias", "1.weight", "1.bias", "1.running_mean",
                                                  "1.running_var", "1.num_batches_tracked", "3.weight", "3.bias"])


def test_onnx_gemm_batch_norm_relu_gemm_imports_and_goes_back(tmp_path: Path,
                                                              capsys: pytest.CaptureFixture[str]) -> None:
    from onnx_graphs import run_onnxruntime
    from onnx_layer_graphs import layer_chain
    from test_onnx_layers import evaluation_output, open_graph

    from stepper import cli

    steps = [("Gemm", {"units": 4, "transB": 1}), ("BatchNormalization", {}), ("Relu", {}), ("Gemm", {"units": 2})]
    path, setup, X = open_graph(tmp_path, layer_chain(steps, (5,)))
    kinds = [type(layer) for layer in setup.network.layers]
    assert kinds == [Dense, BatchNorm, ActivationLayer, Dense]
    assert setup.network.layers[0].activation.name == "identity"  # the Relu did not fold into the Gemm
    # onnxruntime runs the file as given: Stepper's evaluation forward gives its outputs.
    np.testing.assert_allclose(evaluation_output(setup, X), run_onnxruntime(path, X), rtol=1e-12, atol=1e-13)
    out = tmp_path / "back.onnx"
    assert cli.main(["export", str(tmp_path / "model.toml"), "--to", str(out)]) == 0, capsys.readouterr().err
    assert [n.op_type for n in onnx.load(str(out)).graph.node][:4] == ["Gemm", "BatchNormalization", "Relu", "Gemm"]
    # ...and runs the written file with the same outputs.
    np.testing.assert_allclose(run_onnxruntime(out, X), run_onnxruntime(path, X), rtol=1e-12, atol=1e-13)


@pytest.mark.parametrize("shaped", [False, True], ids=["entries", "channels"])
def test_health_counts_dead_relu_entries_and_saturated_ones(shaped: bool) -> None:
    from stepper.core.health import layer_health

    net = _conv_network() if shaped else _network("relu")
    rng = np.random.default_rng(9)
    theta = rng.normal(size=net.n_params)
    shift, scale = net.layout.find_block(1, "shift"), net.layout.find_block(1, "scale")
    # Batch norm at scale 1, shift 0: each unit has mean 0 over the batch, so some sample is above 0...
    theta[shift.start : shift.stop], theta[scale.start : scale.stop] = 0.0, 1.0
    # ...except unit 1, whose output is at most sqrt(n - 1) = 3 from its shift: below 0 on every sample.
    theta[shift.start + 1] = -50.0
    X = rng.normal(size=(10, net.n_inputs))
    report = layer_health(net, theta, X, rng.normal(size=(10, 2)), 0.1)
    relu = report.layers[2]
    assert relu.per == ("channel" if shaped else "unit")
    # Unit (channel) 1 is below ReLU's kink on every sample: dead by the definition of a dead unit.
    assert relu.dead_units.tolist() == [1]
    assert relu.active is not None and relu.active.shape == ((2,) if shaped else (5,))
    if not shaped:
        tanh = _network("tanh")
        theta[shift.start + 1] = 50.0  # tanh'(50) ~ 1e-43: below the 0.01 that counts as saturated
        report = layer_health(tanh, theta, X, rng.normal(size=(10, 2)), 0.1)
        assert report.layers[2].saturated_units.tolist() == [1]
