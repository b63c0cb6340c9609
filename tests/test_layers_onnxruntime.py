"""Forward passes of every built-in layer against onnxruntime's operator of the same name.

Each layer runs on seeded random input, and a one-node ONNX graph of the
operator the layer stands for runs the same input through onnxruntime (the
reference implementation of the ONNX operator set; operator semantics from the
ONNX operator documentation, https://onnx.ai/onnx/operators/): Conv (followed
by the activation's own operator), MaxPool, AveragePool, Flatten, Dropout,
LayerNormalization, BatchNormalization and Gather. Convolutions are checked a
second time against ``scipy.signal.correlate``, channel by channel.

onnxruntime's CPU kernels of several of these operators (Conv, AveragePool)
exist only for float32, so every graph runs in float32 and the tolerance is
float32's: 1e-5 relative (common practice for float32 against float64, no
published source). The checks at float64 precision are the scipy one here and
the jax ones in tests/test_layers_jax.py.
"""

from __future__ import annotations

from typing import Any

import numpy as np
import pytest

onnx = pytest.importorskip("onnx")
ort = pytest.importorskip("onnxruntime")
from onnx import TensorProto, helper, numpy_helper  # noqa: E402
from scipy.signal import correlate  # noqa: E402

from layer_cases import Case, cases, input_of, params_of  # noqa: E402
from stepper.core.layers import BatchNorm, Conv, Dropout, Embedding, Flatten, LayerNorm, Mode, Pool  # noqa: E402

OPSET = 17
CASES = cases()
ACT_OPS = {"tanh": "Tanh", "sigmoid": "Sigmoid", "relu": "Relu"}


def run(nodes: list[Any], inputs: dict[str, np.ndarray], initializers: dict[str, np.ndarray],
        outputs: list[str], opset: int = OPSET) -> list[np.ndarray]:
    """Run a small graph in onnxruntime on float64 tensors; returns the named outputs."""
    inputs = {name: single(a) for name, a in inputs.items()}
    graph = helper.make_graph(
        nodes, "layer",
        [helper.make_tensor_value_info(name, helper.np_dtype_to_tensor_dtype(a.dtype), list(a.shape))
         for name, a in inputs.items()],
        [helper.make_tensor_value_info(name, TensorProto.BOOL if name == "mask" else TensorProto.FLOAT, None)
         for name in outputs],
        [numpy_helper.from_array(single(a), name) for name, a in initializers.items()],
    )
    model = helper.make_model(graph, opset_imports=[helper.make_opsetid("", opset)])
    model.ir_version = 8
    session = ort.InferenceSession(model.SerializeToString(), providers=["CPUExecutionProvider"])
    return [np.asarray(out, dtype=np.float64) if out.dtype == np.float32 else out
            for out in session.run(outputs, inputs)]


def single(a: np.ndarray) -> np.ndarray:
    """float64 arrays as float32 (what onnxruntime's CPU kernels take); others unchanged."""
    return a.astype(np.float32) if a.dtype == np.float64 else a


def close(ours: np.ndarray, ref: np.ndarray, rtol: float = 1e-5) -> None:
    np.testing.assert_allclose(ours, ref, rtol=rtol, atol=rtol * 0.1 * float(np.max(np.abs(ref))))


def conv_pads(case: Case, layer: Conv) -> dict[str, Any]:
    padding = case.settings["padding"]
    if padding == "same":
        return {"auto_pad": "SAME_UPPER"}
    p = 0 if padding == "valid" else int(padding)
    return {"pads": [p] * (2 * len(layer.in_shape[1:]))}


@pytest.mark.parametrize("case", CASES, ids=[c.name for c in CASES])
def test_forward_matches_onnxruntime(case: Case) -> None:
    layer = case.layer
    params, X = params_of(layer), input_of(layer)
    n = X.shape[0]
    out, _ = layer.forward(params, X)
    s = case.settings
    shaped = {"X": X.reshape((n,) + layer.in_shape)}
    if isinstance(layer, Conv):
        names = ["X", "K"] + (["b"] if layer.bias else [])
        nodes = [helper.make_node("Conv", names, ["Z"], kernel_shape=list(s["kernel"]), strides=list(s["stride"]),
                                  **conv_pads(case, layer)),
                 helper.make_node(ACT_OPS[s["activation"]], ["Z"], ["Y"])]
        (ref,) = run(nodes, shaped, {k: params[k] for k in names[1:]}, ["Y"])
    elif isinstance(layer, Pool):
        op = "MaxPool" if layer.how == "max" else "AveragePool"
        nodes = [helper.make_node(op, ["X"], ["Y"], kernel_shape=list(s["size"]), strides=list(s["stride"]))]
        (ref,) = run(nodes, shaped, {}, ["Y"])
    elif isinstance(layer, Flatten):
        (ref,) = run([helper.make_node("Flatten", ["X"], ["Y"], axis=1)], shaped, {}, ["Y"])
    elif isinstance(layer, Dropout):
        # ONNX Dropout (training mode) scales what it keeps by 1 / (1 - ratio); its random mask is
        # its own, so the check is ours given ONNX's mask: output = X * mask / (1 - ratio).
        nodes = [helper.make_node("Dropout", ["X", "ratio", "training"], ["Y", "mask"], seed=1)]
        ref, mask = run(nodes, {"X": X}, {"ratio": np.array(s["rate"]), "training": np.array(True)},
                        ["Y", "mask"])
        close(X * mask / (1.0 - s["rate"]), ref)
        mine = out / np.where(X == 0.0, 1.0, X)
        assert set(np.unique(np.round(mine, 12))) <= {0.0, round(1.0 / (1.0 - s["rate"]), 12)}
        (same,) = run([helper.make_node("Dropout", ["X"], ["Y"])], {"X": X}, {}, ["Y"])
        close(layer.bind(Mode(training=False), {}).forward(params, X)[0], same)  # evaluation: unchanged
        return
    elif isinstance(layer, LayerNorm):
        nodes = [helper.make_node("LayerNormalization", ["X", "scale", "shift"], ["Y"], axis=1,
                                  epsilon=s["epsilon"])]
        (ref,) = run(nodes, shaped, {"scale": params["scale"], "shift": params["shift"]}, ["Y"])
    elif isinstance(layer, BatchNorm):
        ref = batch_norm_training(layer, params, shaped["X"], s["epsilon"])
    elif isinstance(layer, Embedding):
        cats = X[:, list(s["columns"])].astype(np.int64)
        (vectors,) = run([helper.make_node("Gather", ["E", "I"], ["Y"], axis=0)], {"I": cats},
                         {"E": params["E"]}, ["Y"])
        ref = np.concatenate([vectors.reshape(n, -1), np.delete(X, list(s["columns"]), axis=1)], axis=1)
    else:
        raise AssertionError(case.name)
    close(out, ref.reshape(n, -1))


def batch_norm_training(layer: BatchNorm, params: dict[str, np.ndarray], X: np.ndarray, eps: float) -> np.ndarray:
    """ONNX BatchNormalization in training mode (opset 15): the output, and its running statistics checked."""
    C = layer.in_shape[0]
    rng = np.random.default_rng(5)
    running = {"mean": rng.normal(size=C), "var": rng.uniform(0.5, 2.0, C)}
    node = helper.make_node("BatchNormalization", ["X", "scale", "shift", "mean", "var"], ["Y", "new_mean", "new_var"],
                            epsilon=eps, momentum=layer.momentum, training_mode=1)
    shaped = X if X.ndim > 2 else X.reshape(X.shape + (1,))
    ref, new_mean, new_var = run([node], {"X": shaped}, {"scale": params["scale"], "shift": params["shift"],
                                                         "mean": running["mean"], "var": running["var"]},
                                 ["Y", "new_mean", "new_var"], opset=15)
    _, cache = layer.forward(params, X.reshape(X.shape[0], -1))
    state = layer.next_state(cache, {"running_mean": running["mean"], "running_var": running["var"]})
    close(state["running_mean"], new_mean)
    close(state["running_var"], new_var)
    return ref


def test_batch_norm_in_evaluation_matches_onnxruntime() -> None:
    layer = BatchNorm((3, 4, 5))
    params, X = params_of(layer), input_of(layer)
    rng = np.random.default_rng(2)
    mean, var = rng.normal(size=3), rng.uniform(0.5, 2.0, 3)
    bound = layer.bind(Mode(training=False), {"running_mean": mean, "running_var": var})
    node = helper.make_node("BatchNormalization", ["X", "scale", "shift", "mean", "var"], ["Y"], epsilon=1e-5)
    (ref,) = run([node], {"X": X.reshape(-1, 3, 4, 5)},
                 {"scale": params["scale"], "shift": params["shift"], "mean": mean, "var": var}, ["Y"])
    close(bound.forward(params, X)[0], ref.reshape(X.shape[0], -1))


@pytest.mark.parametrize("case", [c for c in CASES if isinstance(c.layer, Conv)],
                         ids=[c.name for c in CASES if isinstance(c.layer, Conv)])
def test_convolution_matches_scipy_correlate(case: Case) -> None:
    # scipy.signal.correlate(x, k, mode="valid") is sum_u x[p + u] k[u] per channel (no kernel flip);
    # summing over input channels, keeping every stride-th position and adding the bias is the layer's Z.
    layer = case.layer
    assert isinstance(layer, Conv)
    params, X = params_of(layer), input_of(layer)
    n, (C, *size) = X.shape[0], layer.in_shape
    xs = X.reshape((n, C) + tuple(size))
    pads = [(0, 0), (0, 0)] + list(layer.grid.pad)
    if case.settings["padding"] == "same":  # ONNX SAME_UPPER: the odd zero goes after
        totals = [max((-(-m // st) - 1) * st + w - m, 0) for m, w, st in
                  zip(size, case.settings["kernel"], case.settings["stride"])]
        assert pads[2:] == [(t // 2, t - t // 2) for t in totals]
    xs = np.pad(xs, pads)
    picks = tuple(slice(None, None, st) for st in case.settings["stride"])
    Z = np.zeros((n, layer.channels) + layer.grid.out)
    for s in range(n):
        for o in range(layer.channels):
            full = sum(correlate(xs[s, c], params["K"][o, c], mode="valid") for c in range(C))
            Z[s, o] = full[picks] + (params["b"][o] if layer.bias else 0.0)
    out, _ = layer.forward(params, X)
    close(out, layer.activation.fn(Z).reshape(n, -1), rtol=1e-12)
