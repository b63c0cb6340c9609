"""Generate net.onnx for the glasshouse-vents scenario with onnx.helper (seeded, so it is reproducible).

The network is written the way a framework exports a small untrained MLP:
a Gemm whose weight is stored (out, in) with transB = 1, as PyTorch's Linear
keeps it; a Tanh; a MatMul and an Add for the second layer (weight stored
(in, out)); a Sigmoid for the vent fraction. Weights are float32, drawn from a
seeded generator with the spread of Glorot & Bengio's uniform scheme.

Usage: ``python make_network.py [OUT]`` writes ``OUT`` (default: net.onnx
beside this script). The same seed always gives the same bytes.
"""

import argparse
from pathlib import Path

import numpy as np
import onnx
from onnx import TensorProto, helper, numpy_helper

N_IN, N_HIDDEN, N_OUT = 4, 6, 1


def glorot(rng: np.random.Generator, shape: tuple[int, int], fan_in: int, fan_out: int) -> np.ndarray:
    limit = np.sqrt(6.0 / (fan_in + fan_out))
    return rng.uniform(-limit, limit, shape).astype(np.float32)


def network() -> onnx.ModelProto:
    rng = np.random.default_rng(7)
    weights = [
        numpy_helper.from_array(glorot(rng, (N_HIDDEN, N_IN), N_IN, N_HIDDEN), "hidden.weight"),
        numpy_helper.from_array(np.zeros(N_HIDDEN, np.float32), "hidden.bias"),
        numpy_helper.from_array(glorot(rng, (N_HIDDEN, N_OUT), N_HIDDEN, N_OUT), "vent.weight"),
        numpy_helper.from_array(np.zeros(N_OUT, np.float32), "vent.bias"),
    ]
    nodes = [
        helper.make_node("Gemm", ["readings", "hidden.weight", "hidden.bias"], ["hidden.z"], name="hidden",
                         transB=1),
        helper.make_node("Tanh", ["hidden.z"], ["hidden.a"], name="hidden.tanh"),
        helper.make_node("MatMul", ["hidden.a", "vent.weight"], ["vent.xw"], name="vent"),
        helper.make_node("Add", ["vent.xw", "vent.bias"], ["vent.z"], name="vent.bias"),
        helper.make_node("Sigmoid", ["vent.z"], ["opening"], name="vent.sigmoid"),
    ]
    graph = helper.make_graph(
        nodes, "glasshouse-vents",
        [helper.make_tensor_value_info("readings", TensorProto.FLOAT, ["samples", N_IN])],
        [helper.make_tensor_value_info("opening", TensorProto.FLOAT, ["samples", N_OUT])],
        weights,
    )
    model = helper.make_model(graph, opset_imports=[helper.make_opsetid("", 17)], producer_name="make_network.py")
    model.ir_version = 8
    onnx.checker.check_model(model)
    return model


def main(argv: list[str] | None = None) -> None:
    parser = argparse.ArgumentParser(description="Write the glasshouse-vents network.")
    parser.add_argument("out", nargs="?", type=Path, default=Path(__file__).with_name("net.onnx"),
                        help="where to write the ONNX file (default: net.onnx beside this script)")
    args = parser.parse_args(argv)
    args.out.write_bytes(network().SerializeToString())


if __name__ == "__main__":
    main()
