"""Starting weights from a safetensors file in a framework's layout (PyTorch Linear layout).

No PyTorch code runs here: the files are written from numpy, in the layout that
PyTorch's documentation of ``torch.nn.Linear`` describes, and the outside reference
is that documented layout and formula (recalled from memory). The documentation gives
``y = x A^T + b`` with ``weight`` A of shape ``(out_features, in_features)``
and ``bias`` of shape ``(out_features,)``; an ``nn.Sequential`` names its
parameters ``<index>.weight`` / ``<index>.bias``. Stepper's W is ``(n_in, n_out)``,
so a mapping with ``transpose = true`` must give W = A^T. The test files are
written with ``safetensors.numpy.save_file`` (no PyTorch needed).
"""

from __future__ import annotations

from pathlib import Path

import numpy as np
import pytest
from safetensors.numpy import save_file

from stepper import cli
from stepper.errors import ModelFileError
from stepper.formats.model_file import load_setup
from stepper.session import Session

ROOT = Path(__file__).resolve().parents[1] / "scenarios"
BAKERY_CSV = (ROOT / "bakery-demand" / "data.csv").as_posix()

GOOD_NAMES = """
"L1.W" = { tensor = "0.weight", transpose = true }
"L1.b" = "0.bias"
"L2.W" = { tensor = "2.weight", transpose = true }
"L2.b" = "2.bias"
"""


def framework_tensors(dtype: type = np.float64) -> dict[str, np.ndarray]:
    """A 4 -> 6 -> 1 network as an nn.Sequential(Linear, Tanh, Linear) would name and shape it."""
    rng = np.random.default_rng(21)
    return {
        "0.weight": rng.normal(size=(6, 4)).astype(dtype),
        "0.bias": rng.normal(size=6).astype(dtype),
        "2.weight": rng.normal(size=(1, 6)).astype(dtype),
        "2.bias": rng.normal(size=1).astype(dtype),
    }


def write_model(folder: Path, names: str = GOOD_NAMES, tensors: dict[str, np.ndarray] | None = None,
                init_extra: str = "", file: str = "trained.safetensors") -> Path:
    if tensors is not None:
        save_file(tensors, str(folder / "trained.safetensors"))
    model = folder / "model.toml"
    model.write_text(
        f"""
loss = "mean_squared_error"

[data]
file = "{BAKERY_CSV}"
inputs = ["temperature", "rain", "weekday", "footfall"]
targets = ["loaves"]
standardize = true

[init]
file = "{file}"
{init_extra}
[init.names]
{names}

[[layers]]
units = 6
activation = "tanh"

[[layers]]
units = 1
activation = "identity"
""",
        encoding="utf-8",
    )
    return model


def test_pytorch_linear_weights_land_transposed(tmp_path: Path) -> None:
    tensors = framework_tensors()
    setup = load_setup(write_model(tmp_path, tensors=tensors))
    net, theta = setup.network, setup.theta0
    index = net.layout.index_of
    for i in range(4):
        for j in range(6):
            # torch.nn.Linear: weight[j, i] connects input i to output j.
            assert theta[index[f"L1.W[{i},{j}]"]] == tensors["0.weight"][j, i]
    for j in range(6):
        assert theta[index[f"L1.b[{j}]"]] == tensors["0.bias"][j]
        assert theta[index[f"L2.W[{j},0]"]] == tensors["2.weight"][0, j]
    assert theta[index["L2.b[0]"]] == tensors["2.bias"][0]
    # The network computes what the framework's documented formula computes.
    X = setup.data.X
    hidden = np.tanh(X @ tensors["0.weight"].T + tensors["0.bias"])
    expected = hidden @ tensors["2.weight"].T + tensors["2.bias"]
    np.testing.assert_allclose(net.predict(theta, X), expected, rtol=1e-13, atol=1e-14)


def test_imported_weights_are_stepped_and_reset_to(tmp_path: Path) -> None:
    setup = load_setup(write_model(tmp_path, tensors=framework_tensors()))
    s = Session(setup, rate=0.05)
    start = s.theta.copy()
    s.step(5)
    assert s.train_cost() < s.history[0].train_cost
    s.reset()
    assert s.theta.tobytes() == start.tobytes()


def test_float32_tensors_are_widened_exactly(tmp_path: Path) -> None:
    tensors = framework_tensors(np.float32)
    setup = load_setup(write_model(tmp_path, tensors=tensors))
    block = setup.network.layout.find_block(0, "W")
    W = setup.theta0[block.start : block.stop].reshape(block.shape)
    assert np.array_equal(W, tensors["0.weight"].T.astype(np.float64))


def test_untransposed_mapping_without_the_flag(tmp_path: Path) -> None:
    # A file already in Stepper's (n_in, n_out) layout needs no transpose.
    tensors = framework_tensors()
    ours = {"w1": np.ascontiguousarray(tensors["0.weight"].T), "b1": tensors["0.bias"],
            "w2": np.ascontiguousarray(tensors["2.weight"].T), "b2": tensors["2.bias"]}
    names = '"L1.W" = "w1"\n"L1.b" = "b1"\n"L2.W" = { tensor = "w2" }\n"L2.b" = "b2"\n'
    a = load_setup(write_model(tmp_path, names=names, tensors=ours)).theta0
    (tmp_path / "trained.safetensors").unlink()
    b = load_setup(write_model(tmp_path, tensors=tensors)).theta0
    assert a.tobytes() == b.tobytes()


@pytest.mark.parametrize("names, tensors, message", [
    (GOOD_NAMES.replace('"0.bias"', '"0.bais"'), None,
     "init.names.L1.b: {file} has no tensor '0.bais' (it has 0.bias, 0.weight, 2.bias, 2.weight)"),
    (GOOD_NAMES.replace('{ tensor = "0.weight", transpose = true }', '"0.weight"'), None,
     "init.names.L1.W: tensor '0.weight' gives shape (6, 4), the model needs (4, 6) (did you mean transpose = true?)"),
    (GOOD_NAMES + '"L3.W" = "4.weight"\n', None,
     "init.names.L3.W: the model has no array L3.W (it has L1.W, L1.b, L2.W, L2.b)"),
    (GOOD_NAMES.replace('"L2.b" = "2.bias"', ""), None, "init.names: no tensor given for L2.b"),
    (GOOD_NAMES.replace('"L1.b" = "0.bias"', '"L1.b" = "2.bias"'), None,
     "init.names.L1.b: tensor '2.bias' gives shape (1,), the model needs (6,)"),
    (GOOD_NAMES.replace('"L1.b" = "0.bias"', '"L1.b" = { tensor = "0.bias", flip = true }'), None,
     'init.names.L1.b: expected a tensor name, or { tensor = "...", transpose = true|false }'),
    (GOOD_NAMES, {"steps": np.arange(6, dtype=np.int64)}, "init.names.L1.b: tensor '0.bias' is int64, not floating point"),
    (GOOD_NAMES, {"0.bias": np.array([1.0, np.nan, 0, 0, 0, 0])}, "init.names.L1.b: tensor '0.bias' holds a value that is not finite"),
])
def test_import_errors_name_the_key(tmp_path: Path, names: str, tensors: dict[str, np.ndarray] | None,
                                    message: str) -> None:
    all_tensors = framework_tensors()
    if tensors is not None:
        if "steps" in tensors:
            all_tensors["0.bias"] = tensors["steps"]
        else:
            all_tensors.update(tensors)
    model = write_model(tmp_path, names=names, tensors=all_tensors)
    with pytest.raises(ModelFileError) as info:
        load_setup(model)
    assert info.value.message == f"{model}: " + message.replace("{file}", str(tmp_path / "trained.safetensors"))


def test_unquoted_dotted_names_get_a_hint(tmp_path: Path) -> None:
    # In TOML, L1.W = ... (without quotes) is the key W inside a table L1.
    names = 'L1.W = { tensor = "0.weight", transpose = true }\nL1.b = "0.bias"\n' \
            'L2.W = { tensor = "2.weight", transpose = true }\nL2.b = "2.bias"\n'
    model = write_model(tmp_path, names=names, tensors=framework_tensors())
    with pytest.raises(ModelFileError, match=r'write the name in quotes: "L1\.W" = '):
        load_setup(model)


def test_missing_file_and_mixed_scheme(tmp_path: Path, capsys: pytest.CaptureFixture[str]) -> None:
    model = write_model(tmp_path, file="nowhere.safetensors")
    with pytest.raises(ModelFileError, match=r"init.file: .*nowhere.safetensors: no such file"):
        load_setup(model)
    model = write_model(tmp_path, tensors=framework_tensors(), init_extra='scheme = "he_normal"')
    with pytest.raises(ModelFileError, match="init.scheme: not used together with \\[init\\].file"):
        load_setup(model)
    # Through the command line: one line, exit 2.
    code = cli.main(["run", str(model), "--steps", "1"])
    err = capsys.readouterr().err
    assert code == 2 and len(err.strip().splitlines()) == 1
    assert "not used together with [init].file" in err


def test_a_stepper_checkpoint_can_seed_a_model(tmp_path: Path) -> None:
    # Our own checkpoints are plain safetensors files, so [init].file can start
    # a model from one (tensor names equal to the array names, no transpose).
    first = Session(load_setup(write_model(tmp_path, tensors=framework_tensors())), rate=0.05)
    first.step(3)
    ck = first.save_checkpoint(tmp_path / "ck.safetensors")
    names = '"L1.W" = "L1.W"\n"L1.b" = "L1.b"\n"L2.W" = "L2.W"\n"L2.b" = "L2.b"\n'
    setup = load_setup(write_model(tmp_path, names=names, file=ck.name))
    assert setup.theta0.tobytes() == first.theta.tobytes()
