"""Convolutions, norms and embeddings written as a PyTorch state_dict (safetensors, ``--layout torch``).

Outside references: the safetensors library reads every file back, and the
tensors are applied in plain numpy as PyTorch's documented modules compute
(pytorch.org, torch.nn: ``Conv2d`` is a bias plus a cross-correlation summed over
input channels, computed here with ``scipy.signal.correlate``; ``BatchNorm2d``
in evaluation is ``(x - running_mean) / sqrt(running_var + eps) * weight + bias``;
``MaxPool2d``; ``Linear`` is ``x weight^T + bias``), without PyTorch itself.
"""

from __future__ import annotations

from pathlib import Path

import numpy as np
import onnx
import pytest
from onnx import numpy_helper
from safetensors.numpy import load_file
from scipy.signal import correlate
from test_onnx_layers_export import graph_model, trained

from stepper import cli

MODEL = """
name = "tiles"
loss = "mean_squared_error"
[data]
file = "data.csv"
inputs = "*"
targets = ["y0", "y1"]
input_shape = [2, 6, 6]
[init]
scheme = "he_uniform"
seed = 4
[[layers]]
type = "conv2d"
channels = 3
kernel = 3
padding = 1
activation = "relu"
[[layers]]
type = "batch_norm"
[[layers]]
type = "max_pool"
size = 2
[[layers]]
type = "flatten"
[[layers]]
units = 5
activation = "relu"
[[layers]]
units = 2
activation = "identity"
"""


def _torch_forward(t: dict[str, np.ndarray], X: np.ndarray) -> np.ndarray:
    """nn.Sequential(Conv2d(2, 3, 3, padding=1), ReLU, BatchNorm2d(3), MaxPool2d(2), Flatten, Linear, ReLU,
    Linear) in evaluation, from its state_dict, in plain numpy."""
    x = np.pad(X.reshape(-1, 2, 6, 6), ((0, 0), (0, 0), (1, 1), (1, 1)))
    w, b = t["0.weight"], t["0.bias"]
    h = np.stack([np.stack([b[o] + sum(correlate(x[n, c], w[o, c], mode="valid") for c in range(2))
                            for o in range(3)]) for n in range(x.shape[0])])
    h = np.maximum(h, 0.0)
    eps = 1e-5  # BatchNorm2d's default eps, the model file's default epsilon
    h = ((h - t["2.running_mean"][:, None, None]) / np.sqrt(t["2.running_var"][:, None, None] + eps)
         * t["2.weight"][:, None, None] + t["2.bias"][:, None, None])
    h = h.reshape(-1, 3, 3, 2, 3, 2).max(axis=(3, 5)).reshape(len(X), -1)
    h = np.maximum(h @ t["5.weight"].T + t["5.bias"], 0.0)
    return h @ t["7.weight"].T + t["7.bias"]


def test_a_conv_batch_norm_network_goes_out_as_an_nn_sequential_state_dict(
        tmp_path: Path, capsys: pytest.CaptureFixture[str]) -> None:
    from onnx_graphs import write_csv

    X = np.random.default_rng(6).normal(size=(20, 72))
    write_csv(tmp_path / "data.csv", X, np.tanh(X[:, :2]))
    (tmp_path / "model.toml").write_text(MODEL, encoding="utf-8")
    session, ck = trained(tmp_path / "model.toml", steps=4)
    out = tmp_path / "state.safetensors"
    assert cli.main(["export", str(tmp_path / "model.toml"), "--resume", str(ck), "--to", str(out)]) == 0
    capsys.readouterr()
    tensors = load_file(str(out))  # the safetensors library
    assert sorted(tensors) == sorted(["0.weight", "0.bias", "2.weight", "2.bias", "2.running_mean", "2.running_var",
                                      "2.num_batches_tracked", "5.weight", "5.bias", "7.weight", "7.bias"])
    assert tensors["0.weight"].shape == (3, 2, 3, 3) and tensors["2.num_batches_tracked"] == 4
    np.testing.assert_allclose(_torch_forward(tensors, X), session.evaluation_net().predict(session.theta, X),
                               rtol=1e-12, atol=1e-13)


def test_weights_from_onnx_keep_the_initializer_names(tmp_path: Path, capsys: pytest.CaptureFixture[str]) -> None:
    model, _ = graph_model(tmp_path)
    out = tmp_path / "state.safetensors"
    assert cli.main(["export", str(model), "--to", str(out)]) == 0
    capsys.readouterr()
    tensors = load_file(str(out))  # the safetensors library
    graph = onnx.load(str(tmp_path / "net.onnx")).graph
    held = {t.name: numpy_helper.to_array(t) for t in graph.initializer
            if t.name.startswith(("conv", "bn", "fc", "ln"))}
    assert set(tensors) == set(held) | {"bn2.num_batches_tracked", "layernormalization7.B"}
    for name, values in held.items():
        # PyTorch's Linear holds (out, in): the Gemm without transB (fc8) stores (in, out), so it turns round.
        expected = values.T if name == "fc8.weight" else values
        assert tensors[name].shape == expected.shape and np.array_equal(tensors[name], expected), name
    assert not tensors["layernormalization7.B"].any()  # the LayerNormalization without B: its shift, still 0
