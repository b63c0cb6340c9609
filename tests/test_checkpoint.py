"""Checkpoints: bit-exact round trips, plain safetensors files, atomic saves, clear refusals.

Outside references: the ``safetensors`` library itself reads our files
(safetensors.numpy.load_file and safe_open(framework="numpy"), documented API);
the file layout (8-byte little-endian header length, JSON header, raw data) is
the published safetensors format (huggingface/safetensors README, "Format").
"""

from __future__ import annotations

import json
import os
import re
import struct
from pathlib import Path
from typing import Any

import numpy as np
import pytest
from safetensors import safe_open
from safetensors.numpy import load_file, save_file

from stepper import cli
from stepper.core.optimizers import fresh_state
from stepper.errors import CheckpointError
from stepper.formats import atomic
from stepper.formats.checkpoint import CheckpointData, encode, load_checkpoint, save_checkpoint
from stepper.formats.model_file import load_setup
from stepper.session import Session

ROOT = Path(__file__).resolve().parents[1] / "scenarios"
BAKERY = ROOT / "bakery-demand" / "model.toml"
KILN = ROOT / "kiln-tiny" / "model.toml"


@pytest.fixture(scope="module")
def bakery():  # type: ignore[no-untyped-def]
    return load_setup(BAKERY)


def busy_session(setup: Any) -> Session:
    """A session whose every saved field differs from a fresh one's."""
    s = Session(setup, rate=0.03, seed=6)
    s.set_rule("adam")
    s.set_batch_size(24)
    s.freeze_matching("L1.b[*]")
    s.step(5)
    s.freeze_matching("L2.W[0,*]")
    s.step(4)
    s.set_slope_source("numeric")
    s.perturb(0.001)  # draws its seed from the session's noise generator
    return s


# -- round trip -------------------------------------------------------------------------------------


def test_round_trip_is_bit_exact(bakery, tmp_path: Path) -> None:  # type: ignore[no-untyped-def]
    s = busy_session(bakery)
    path = s.save_checkpoint(tmp_path / "a.safetensors")
    assert not s.dirty
    fresh = Session(bakery)
    fresh.load_checkpoint(path)
    assert np.array_equal(fresh.theta, s.theta)
    assert fresh.theta.tobytes() == s.theta.tobytes()
    assert fresh.rule_state.equals(s.rule_state)
    for key in s.rule_state.arrays:
        assert fresh.rule_state.arrays[key].tobytes() == s.rule_state.arrays[key].tobytes()
    assert np.array_equal(fresh.frozen, s.frozen)
    assert fresh.history == s.history
    assert (fresh.step_count, fresh.rate, fresh.rule, fresh.slope_source, fresh.batch_size) == \
        (s.step_count, s.rate, s.rule, s.slope_source, s.batch_size)
    assert fresh.batch_rng.bit_generator.state == s.batch_rng.bit_generator.state
    assert fresh.noise_rng.bit_generator.state == s.noise_rng.bit_generator.state
    # Both go on identically, unseeded perturbations included.
    s.set_slope_source("analytic")
    fresh.set_slope_source("analytic")
    s.step(3)
    fresh.step(3)
    s.perturb(0.01)
    fresh.perturb(0.01)
    assert fresh.theta.tobytes() == s.theta.tobytes()


def test_save_load_save_gives_the_same_bytes(bakery, tmp_path: Path) -> None:  # type: ignore[no-untyped-def]
    s = busy_session(bakery)
    first = s.save_checkpoint(tmp_path / "one.safetensors")
    other = Session(bakery)
    other.load_checkpoint(first)
    second = other.save_checkpoint(tmp_path / "two.safetensors")
    assert first.read_bytes() == second.read_bytes()


def test_readable_by_safetensors_alone(bakery, tmp_path: Path) -> None:  # type: ignore[no-untyped-def]
    s = busy_session(bakery)
    path = s.save_checkpoint(tmp_path / "plain.safetensors")
    tensors = load_file(str(path))
    for block in s.net.layout.blocks:
        expected = s.theta[block.start : block.stop].reshape(block.shape)
        assert tensors[block.prefix].dtype == np.float64
        assert tensors[block.prefix].shape == block.shape
        assert tensors[block.prefix].tobytes() == expected.tobytes()
        for key in ("m", "v", "count"):
            want = s.rule_state.arrays[key][block.start : block.stop].reshape(block.shape)
            assert np.array_equal(tensors[f"rule.{key}.{block.prefix}"], want)
    with safe_open(str(path), framework="numpy") as handle:
        meta = json.loads(handle.metadata()["stepper"])
        assert np.array_equal(handle.get_tensor("L2.W"), tensors["L2.W"])
    assert meta["format"] == 2
    assert meta["step_count"] == 9 and meta["rule"] == "adam" and meta["batch_size"] == 24
    assert meta["model_digest"] == bakery.digest
    assert sorted(meta["frozen"]) == sorted(s.names[i] for i in np.flatnonzero(s.frozen))
    # The published layout: 8-byte little-endian header size, then a JSON header.
    raw = path.read_bytes()
    (size,) = struct.unpack("<Q", raw[:8])
    header = json.loads(raw[8 : 8 + size])
    assert header["L1.W"]["dtype"] == "F64" and header["L1.W"]["shape"] == [4, 6]


# -- arrays that are not C-contiguous ---------------------------------------------------------------


def awkward(kind: str, values: np.ndarray) -> np.ndarray:
    """``values`` again, as a 1-D view that is not C-contiguous."""
    n = values.size
    if kind == "strided":
        big = np.zeros(2 * n)
        big[::2] = values
        return big[::2]
    if kind == "column_of_c_array":
        big = np.zeros((n, 3))
        big[:, 1] = values
        return big[:, 1]
    if kind == "row_of_fortran_array":
        big = np.asfortranarray(np.zeros((3, n)))
        big[2] = values
        return big[2]
    if kind == "row_of_transposed":
        big = np.zeros((n, 2))
        big[:, 0] = values
        return big.T[0]
    raise AssertionError(kind)


@pytest.mark.parametrize("kind", ["strided", "column_of_c_array", "row_of_fortran_array", "row_of_transposed"])
def test_non_contiguous_arrays_are_saved_right(bakery, tmp_path: Path, kind: str) -> None:  # type: ignore[no-untyped-def]
    # safetensors 0.8.0's numpy API saves a non-contiguous array without error
    # and reads it back scrambled (found while writing this; shown by the last
    # assertion of test_the_safetensors_pitfall_this_guards_against). encode()
    # makes every array C-contiguous first; without that this test fails.
    layout = bakery.network.layout
    values = np.random.default_rng(2).normal(size=layout.size)
    velocity = np.random.default_rng(3).normal(size=layout.size)
    theta = awkward(kind, values)
    assert not theta.flags.c_contiguous and np.array_equal(theta, values)
    data = CheckpointData(theta, {"velocity": awkward(kind, velocity)}, {"note": kind})
    path = tmp_path / "odd.safetensors"
    save_checkpoint(path, layout, data)
    back = load_checkpoint(path, layout)
    assert back.theta.tobytes() == values.tobytes()
    assert back.rule_arrays["velocity"].tobytes() == velocity.tobytes()
    plain = load_file(str(path))
    for block in layout.blocks:
        assert np.array_equal(plain[block.prefix], values[block.start : block.stop].reshape(block.shape))


def test_the_safetensors_pitfall_this_guards_against() -> None:
    # Documents why encode() copies: handed a transposed array, this version of
    # the library round-trips the wrong values. If a later version fixes that,
    # this test says so (and the copy in encode() stays harmless).
    from safetensors.numpy import load, save

    a = np.arange(6.0).reshape(2, 3)
    back = load(save({"x": np.ascontiguousarray(a.T)}))["x"]
    assert np.array_equal(back, a.T)
    scrambled = load(save({"x": a.T}))["x"]
    if np.array_equal(scrambled, a.T):
        pytest.skip("this safetensors version saves transposed arrays right")
    assert scrambled.shape == (3, 2) and not np.array_equal(scrambled, a.T)


# -- interrupted saves ------------------------------------------------------------------------------


def leftovers(folder: Path) -> list[str]:
    return sorted(p.name for p in folder.iterdir() if p.name.endswith(".tmp"))


def test_failed_rename_keeps_the_old_checkpoint(bakery, tmp_path: Path, monkeypatch: pytest.MonkeyPatch) -> None:  # type: ignore[no-untyped-def]
    s = busy_session(bakery)
    path = s.save_checkpoint(tmp_path / "keep.safetensors")
    old = path.read_bytes()
    s.set_slope_source("analytic")
    s.step(2)

    def refuse(src: Any, dst: Any) -> None:
        raise OSError(28, "No space left on device")

    monkeypatch.setattr(atomic.os, "replace", refuse)
    with pytest.raises(CheckpointError, match="keep.safetensors: cannot write the checkpoint"):
        s.save_checkpoint(path)
    assert path.read_bytes() == old
    assert leftovers(tmp_path) == []
    assert s.dirty
    assert s.last_checkpoint == path  # still the earlier, successful save


@pytest.mark.parametrize("failure", [OSError(5, "Input/output error"), KeyboardInterrupt()])
def test_write_killed_midway_keeps_the_old_checkpoint(bakery, tmp_path: Path, monkeypatch: pytest.MonkeyPatch,  # type: ignore[no-untyped-def]
                                                      failure: BaseException) -> None:
    s = busy_session(bakery)
    path = s.save_checkpoint(tmp_path / "keep.safetensors")
    old = path.read_bytes()
    s.set_slope_source("analytic")
    s.step(2)
    real_fdopen = os.fdopen

    class HalfWriter:
        """Writes the first half of what it is given, then fails (a crash mid-write)."""

        def __init__(self, fd: int, mode: str) -> None:
            self.handle = real_fdopen(fd, mode)

        def __enter__(self) -> "HalfWriter":
            return self

        def __exit__(self, *exc: Any) -> None:
            self.handle.close()

        def write(self, data: bytes) -> int:
            self.handle.write(data[: len(data) // 2])
            self.handle.flush()
            raise failure

        def flush(self) -> None:
            self.handle.flush()

        def fileno(self) -> int:
            return self.handle.fileno()

    monkeypatch.setattr(atomic.os, "fdopen", HalfWriter)
    expected = CheckpointError if isinstance(failure, OSError) else KeyboardInterrupt
    with pytest.raises(expected):
        s.save_checkpoint(path)
    assert path.read_bytes() == old
    assert leftovers(tmp_path) == []
    monkeypatch.undo()
    fresh = Session(bakery)
    fresh.load_checkpoint(path)
    assert fresh.step_count == 9


# -- checkpoints that do not fit ---------------------------------------------------------------------


def write_three_layer_model(folder: Path) -> Path:
    path = folder / "deeper.toml"
    path.write_text(
        f"""
loss = "mean_squared_error"
[data]
file = "{(ROOT / 'bakery-demand' / 'data.csv').as_posix()}"
inputs = ["temperature", "rain", "weekday", "footfall"]
targets = ["loaves"]
[init]
scheme = "glorot_uniform"
seed = 1
[[layers]]
units = 6
activation = "tanh"
[[layers]]
units = 3
activation = "tanh"
[[layers]]
units = 1
activation = "identity"
""",
        encoding="utf-8",
    )
    return path


def float32_copy(source: Path, target: Path) -> Path:
    with safe_open(str(source), framework="numpy") as handle:
        metadata = handle.metadata()
        tensors = {k: handle.get_tensor(k).astype(np.float32) for k in handle.keys()}
    save_file(tensors, str(target), metadata=metadata)
    return target


def mismatched(kind: str, folder: Path) -> Path:
    if kind == "other_names":
        return Session(load_setup(write_three_layer_model(folder))).save_checkpoint(folder / "deeper.safetensors")
    if kind == "other_shapes":
        return Session(load_setup(KILN)).save_checkpoint(folder / "kiln.safetensors")
    if kind == "float32":
        good = Session(load_setup(BAKERY)).save_checkpoint(folder / "good.safetensors")
        return float32_copy(good, folder / "single.safetensors")
    if kind == "not_stepper":
        path = folder / "foreign.safetensors"
        save_file({"L1.W": np.zeros((4, 6))}, str(path))
        return path
    if kind == "garbage":
        path = folder / "garbage.safetensors"
        path.write_bytes(np.random.default_rng(0).bytes(300))
        return path
    if kind == "short":
        path = folder / "short.safetensors"
        path.write_bytes(b"abc")
        return path
    if kind == "missing":
        return folder / "nowhere.safetensors"
    raise AssertionError(kind)


MISMATCH_MESSAGES = {
    "other_names": "does not fit the model: has L3.W, L3.b which the model does not",
    "other_shapes": "tensor L1.W has shape (2, 2), the model needs (4, 6)",
    "float32": "tensor L1.W is float32, expected float64",
    "not_stepper": "not a Stepper checkpoint",
    "garbage": "not a safetensors file",
    "short": "too short to be a safetensors file",
    "missing": "no such file",
}


@pytest.mark.parametrize("kind", list(MISMATCH_MESSAGES))
def test_mismatched_checkpoint_is_refused_by_run_resume(tmp_path: Path, kind: str,
                                                        capsys: pytest.CaptureFixture[str]) -> None:
    path = mismatched(kind, tmp_path)
    capsys.readouterr()
    code = cli.main(["run", str(BAKERY), "--resume", str(path), "--steps", "1"])
    out, err = capsys.readouterr()
    assert code == 2
    assert out == ""
    lines = err.strip().splitlines()
    assert len(lines) == 1, err
    assert lines[0].startswith(f"stepper: {path}: ")
    assert MISMATCH_MESSAGES[kind] in lines[0]


@pytest.mark.parametrize("kind", ["other_shapes", "float32", "not_stepper"])
def test_refused_load_leaves_the_session_alone(bakery, tmp_path: Path, kind: str) -> None:  # type: ignore[no-untyped-def]
    s = busy_session(bakery)
    theta, state, history = s.theta.copy(), s.rule_state.copy(), list(s.history)
    with pytest.raises(CheckpointError):
        s.load_checkpoint(mismatched(kind, tmp_path))
    assert s.theta.tobytes() == theta.tobytes()
    assert s.rule_state.equals(state) and s.history == history


def rewrite_meta(source: Path, target: Path, change: dict[str, Any]) -> Path:
    with safe_open(str(source), framework="numpy") as handle:
        meta = json.loads(handle.metadata()["stepper"])
        tensors = {k: handle.get_tensor(k) for k in handle.keys()}
    meta.update(change)
    save_file(tensors, str(target), metadata={"stepper": json.dumps(meta)})
    return target


@pytest.mark.parametrize("change, message", [
    ({"batch_rng": {"bit_generator": "PCG64", "state": {"state": -5, "inc": 3}, "has_uint32": 0, "uinteger": 0}},
     "batch generator state is not valid"),
    ({"batch_rng": {"bit_generator": "MT19937", "state": {}}}, "batch generator state is not valid"),
    ({"batch_rng": "soon"}, "batch generator state is not valid"),
    ({"history_length": 0}, "metadata is incomplete or wrong (history_length: 0 is outside"),
    ({"history_length": 5}, "tensor history.train is float64 (11,), expected float64 (5,)"),
    ({"history_rules": ["gd", "lbfgs"]}, "history_rules names an unknown rule"),
    ({"step_count": 1e999}, "the 'stepper' metadata: Infinity is not a number JSON allows"),
    ({"step_count": "9"}, "step_count: expected a whole number, got '9'"),
    ({"batch_size": 0}, "batch_size: 0 is outside [1, 192]"),
    ({"batch_size": 1000}, "batch_size: 1000 is outside [1, 192]"),
    ({"batch_size": -3}, "batch_size: -3 is outside [1, 192]"),
    ({"rule_t": True}, "rule_t: expected a whole number, got true"),
    ({"batch_rng": {"bit_generator": "PCG64", "state": {"state": 2**130, "inc": 3}, "has_uint32": 0,
                    "uinteger": 0}}, "batch generator state is not valid"),
    ({"batch_cursor": 999}, "batch_cursor: 999 is outside [0, 192]"),
    ({"rule": "lbfgs"}, "metadata is incomplete or wrong"),
    ({"rule": "momentum"}, "does not fit: the momentum rule's memory (tensors rule.velocity.*) is missing"),
    ({"rate": -1}, "metadata is incomplete or wrong"),
    ({"frozen": ["L9.W[0,0]"]}, "frozen parameter L9.W[0,0] is not in it"),
    ({"slope_source": "guess"}, "unknown slope source 'guess'"),
    ({"format": 7}, "unsupported checkpoint format 7"),
    ({"l2": -0.5}, "metadata is incomplete or wrong"),
    ({"weight_decay": "lots"}, "metadata is incomplete or wrong"),
    ({"clip_norm": 0}, "metadata is incomplete or wrong"),
    ({"schedule": {"kind": "cosine"}}, "metadata is incomplete or wrong (a cosine schedule needs steps)"),
])
def test_bad_metadata_is_refused_and_changes_nothing(bakery, tmp_path: Path,  # type: ignore[no-untyped-def]
                                                     change: dict[str, Any], message: str) -> None:
    good = busy_session(bakery).save_checkpoint(tmp_path / "good.safetensors")
    bad = rewrite_meta(good, tmp_path / "bad.safetensors", change)
    s = Session(bakery, rate=0.2)
    s.step(2)
    before = (s.theta.copy(), s.rule_state.copy(), list(s.history), s.frozen.copy(), s.rate,
              s.step_count, s.batch_rng.bit_generator.state, s.can_undo)
    with pytest.raises(CheckpointError, match=re.escape(message)):
        s.load_checkpoint(bad)
    assert s.theta.tobytes() == before[0].tobytes()
    assert s.rule_state.equals(before[1])
    assert s.history == before[2]
    assert np.array_equal(s.frozen, before[3])
    assert (s.rate, s.step_count, s.batch_rng.bit_generator.state) == before[4:7]
    s.undo()
    assert s.step_count == 0, "the refused load must not have become an undo level"


def test_model_changed_since_save_is_loaded_with_a_note(tmp_path: Path) -> None:
    model = tmp_path / "kiln.toml"
    model.write_text(KILN.read_text(encoding="utf-8").replace('"data.csv"', f'"{(KILN.parent / "data.csv").as_posix()}"'),
                     encoding="utf-8")
    path = Session(load_setup(model)).save_checkpoint(tmp_path / "k.safetensors")
    model.write_text(model.read_text(encoding="utf-8") + "\n# edited\n", encoding="utf-8")
    s = Session(load_setup(model))
    s.load_checkpoint(path)
    assert s.last_action is not None and "model file has changed" in s.last_action


def test_encode_holds_no_rule_arrays_for_plain_descent(bakery) -> None:  # type: ignore[no-untyped-def]
    layout = bakery.network.layout
    raw = encode(layout, CheckpointData(bakery.theta0, fresh_state("gd", layout.size).arrays, {}))
    (size,) = struct.unpack("<Q", raw[:8])
    names = set(json.loads(raw[8 : 8 + size])) - {"__metadata__"}
    assert names == {"L1.W", "L1.b", "L2.W", "L2.b"}
