"""Framework weights without guessing: an nn.Sequential state_dict, and square matrices that need a word.

Outside reference: PyTorch's documentation of ``torch.nn.Linear`` gives
``y = x A^T + b`` with ``weight`` A of shape ``(out_features, in_features)`` and
``bias`` of shape ``(out_features,)``, and an ``nn.Sequential`` names its
parameters ``<index>.weight`` / ``<index>.bias`` (activations take indices
too). The files are written from numpy with ``safetensors.numpy.save_file``
(no PyTorch needed), and the expected cost is that formula in plain numpy.
"""

from __future__ import annotations

from pathlib import Path

import numpy as np
import pytest
from safetensors.numpy import save_file

from stepper import cli
from stepper.errors import ModelFileError
from stepper.formats.model_file import load_setup

ROOT = Path(__file__).resolve().parents[1] / "scenarios"
CSV = (ROOT / "bakery-demand" / "data.csv").as_posix()


def state_dict(sizes: tuple[int, ...] = (4, 4, 4, 1), seed: int = 3, prefix: str = "") -> dict[str, np.ndarray]:
    """nn.Sequential(Linear, Tanh, Linear, Tanh, Linear) shaped and named as PyTorch does: 0, 2, 4."""
    rng = np.random.default_rng(seed)
    out: dict[str, np.ndarray] = {}
    for k, (n_in, n_out) in enumerate(zip(sizes, sizes[1:])):
        out[f"{prefix}{2 * k}.weight"] = rng.normal(0, 0.5, (n_out, n_in))
        out[f"{prefix}{2 * k}.bias"] = rng.normal(0, 0.5, n_out)
    return out


def model_text(layers: str, init: str = 'file = "state.safetensors"\nlayout = "torch"') -> str:
    return f"""
loss = "mean_squared_error"
[data]
file = "{CSV}"
inputs = ["temperature", "rain", "weekday", "footfall"]
targets = ["loaves"]
standardize = true
[init]
{init}
{layers}
"""


THREE = '[[layers]]\nactivation = "tanh"\n' * 2 + '[[layers]]\nactivation = "identity"\n'


def write(tmp_path: Path, text: str, tensors: dict[str, np.ndarray]) -> Path:
    save_file(tensors, str(tmp_path / "state.safetensors"))
    path = tmp_path / "model.toml"
    path.write_text(text, encoding="utf-8")
    return path


def test_a_sequential_state_dict_needs_only_the_activations(tmp_path: Path) -> None:
    tensors = state_dict()
    setup = load_setup(write(tmp_path, model_text(THREE), tensors))
    assert [layer.n_out for layer in setup.network.layers] == [4, 4, 1]
    # PyTorch's Linear in plain numpy: y = x A^T + b, every layer's weight square but the last.
    X, Y = setup.data.X, setup.data.Y
    h = np.tanh(X @ tensors["0.weight"].T + tensors["0.bias"])
    h = np.tanh(h @ tensors["2.weight"].T + tensors["2.bias"])
    out = h @ tensors["4.weight"].T + tensors["4.bias"]
    expected = np.mean((out - Y) ** 2)
    assert setup.network.cost(setup.theta0, X, Y) == pytest.approx(expected, rel=1e-13)
    assert setup.origin is not None and setup.origin.layout == "torch"
    names = setup.origin.source_names(setup.network.layout)
    assert names[setup.network.layout.lookup("L1.W[3,0]")] == "0.weight[0,3]"
    assert names[setup.network.layout.lookup("L3.b[0]")] == "4.bias[0]"


def test_a_prefix_shared_by_every_tensor_is_allowed(tmp_path: Path) -> None:
    setup = load_setup(write(tmp_path, model_text(THREE), state_dict(prefix="net.")))
    assert setup.origin is not None and setup.origin.tensors["L2.W"].tensor == "net.2.weight"


def test_units_that_disagree_with_the_shapes_are_named_with_both(tmp_path: Path) -> None:
    layers = THREE.replace('activation = "tanh"\n', 'activation = "tanh"\nunits = 5\n', 1)
    with pytest.raises(ModelFileError) as info:
        load_setup(write(tmp_path, model_text(layers), state_dict()))
    assert info.value.message.endswith(
        "layers[0].units (L1): 5, but tensor '0.weight' has shape (4, 4) (PyTorch's Linear stores (out, in)): 4 units")


def test_a_state_dict_of_another_depth_is_refused(tmp_path: Path) -> None:
    with pytest.raises(ModelFileError) as info:
        load_setup(write(tmp_path, model_text('[[layers]]\nactivation = "tanh"\n'), state_dict()))
    assert info.value.message.endswith(
        "layers: 1 [[layers]] tables, but " + str(tmp_path / "state.safetensors") + " holds 3 Linear layers "
        "(0.weight, 2.weight, 4.weight); layout = \"torch\" maps them one to one, in order")


def test_inputs_that_do_not_fit_the_first_weight(tmp_path: Path) -> None:
    with pytest.raises(ModelFileError) as info:
        load_setup(write(tmp_path, model_text(THREE), state_dict(sizes=(5, 4, 4, 1))))
    assert info.value.message.endswith(
        "layers[0] (L1): tensor '0.weight' has shape (4, 5) (PyTorch's Linear stores (out, in)): 5 inputs, "
        "but the layer gets 4")


def test_a_square_matrix_without_a_declared_layout_is_refused(tmp_path: Path, capsys: pytest.CaptureFixture[str]) -> None:
    # The trap: every hidden weight is 4x4, so a mapping without transpose fits
    # either way round and would be taken silently the wrong way.
    names = "\n".join(f'"L{k + 1}.W" = "{2 * k}.weight"\n"L{k + 1}.b" = "{2 * k}.bias"' for k in range(3))
    layers = THREE.replace('activation = "tanh"', 'units = 4\nactivation = "tanh"').replace(
        'activation = "identity"', 'units = 1\nactivation = "identity"')
    path = write(tmp_path, model_text(layers, f'file = "state.safetensors"\n[init.names]\n{names}'), state_dict())
    assert cli.main(["check", str(path)]) == 2
    err = capsys.readouterr().err
    assert err == (f"stepper: {path}: init.names.L1.W: tensor '0.weight' is square (4x4), so its shape cannot "
                   "tell which way round it is stored: say transpose = true (PyTorch's Linear stores (out, in)) "
                   "or transpose = false (stored (in, out)), or use layout = \"torch\"\n")
    # Declared, it is taken as said.
    fixed = names.replace('"0.weight"', '{ tensor = "0.weight", transpose = true }').replace(
        '"2.weight"', '{ tensor = "2.weight", transpose = true }').replace(
        '"4.weight"', '{ tensor = "4.weight", transpose = true }')
    path = write(tmp_path, model_text(layers, f'file = "state.safetensors"\n[init.names]\n{fixed}'), state_dict())
    setup = load_setup(path)
    block = setup.network.layout.find_block(0, "W")
    assert np.array_equal(setup.theta0[block.start : block.stop].reshape(4, 4), state_dict()["0.weight"].T)


def test_stray_tensors_are_named(tmp_path: Path) -> None:
    tensors = state_dict()
    tensors["1.running_mean"] = np.zeros(4)
    with pytest.raises(ModelFileError) as info:
        load_setup(write(tmp_path, model_text(THREE), tensors))
    assert "init.layout: tensor '1.running_mean' of " in info.value.message
    assert "is not a Linear layer's weight or bias" in info.value.message
