"""A convolution's health channel by channel: in check (text and JSON) and explain.

The reference for which channel is dead and how often each ReLU passes is the
convolution recomputed with ``scipy.signal.correlate`` (a cross-correlation,
as every framework's convolution; SciPy documentation, scipy.signal.correlate),
on the same standardized inputs and weights, and the norms are
``numpy.linalg.norm`` of the kernel's rows. A channel whose bias is pushed far
below every window's sum never passes its ReLU: it is dead (the definition in
README, "Layers beyond dense").
"""

from __future__ import annotations

import json
from pathlib import Path

import numpy as np
import pytest
from scipy.signal import correlate

from stepper.cli import main
from stepper.core.health import layer_health, unit_health, unit_of
from stepper.formats.model_file import load_setup
from stepper.session import Session

ROOT = Path(__file__).resolve().parents[1] / "scenarios"
DEAD = 5


@pytest.fixture(scope="module")
def killed(tmp_path_factory: pytest.TempPathFactory) -> tuple[Path, Session]:
    """glaze-defects after two steps, with channel 5's bias at -100, saved."""
    s = Session(load_setup(ROOT / "glaze-defects" / "model.toml"), rate=0.05)
    s.step(2)
    s.set_value(s.net.layout.lookup(f"L1.b[{DEAD}]"), -100.0)
    return s.save_checkpoint(tmp_path_factory.mktemp("health") / "dead.safetensors"), s


def reference_activity(s: Session) -> tuple[np.ndarray, np.ndarray]:
    """Per channel: share of samples x positions with a positive pre-activation, and the kernel's norm."""
    views = s.net.views(s.theta)[0]
    K, b = views["K"], views["b"]
    images = s.setup.data.X.reshape(-1, 8, 8)
    active = []
    for o in range(K.shape[0]):
        Z = np.stack([correlate(img, K[o, 0], mode="same", method="direct") for img in images]) + b[o]
        active.append(np.mean(Z > 0.0))
    return np.array(active), np.linalg.norm(K.reshape(K.shape[0], -1), axis=1)


def test_check_lists_each_channel_and_names_the_dead_one(killed: tuple[Path, Session],
                                                         capsys: pytest.CaptureFixture[str]) -> None:
    path, s = killed
    assert main(["check", str(ROOT / "glaze-defects"), "--resume", str(path), "--json"]) == 0
    doc = json.loads(capsys.readouterr().out)
    conv = doc["health"]["layers"][0]
    active, norms = reference_activity(s)
    assert active[DEAD] == 0.0 and np.all(np.delete(active, DEAD) > 0.2)
    assert conv["dead_units"] == [DEAD]
    assert [u["state"] for u in conv["units"]] == [("dead" if o == DEAD else None) for o in range(8)]
    np.testing.assert_allclose([u["active"] for u in conv["units"]], active, rtol=1e-12)
    np.testing.assert_allclose([u["weight_norm"] for u in conv["units"]], norms, rtol=1e-12)
    assert all(u["per"] == "channel" and u["positions"] == 64 for u in conv["units"])

    assert main(["check", str(ROOT / "glaze-defects"), "--resume", str(path)]) == 0
    text = capsys.readouterr().out
    assert f"L1 conv2d 1x8x8->8x8x8 relu: 1 dead channels: {DEAD}" in text
    rows = [line.split() for line in text.splitlines() if line[:7].strip().isdigit() and "%" in line]
    assert [row[0] for row in rows] == [str(o) for o in range(8)]
    assert rows[DEAD][1] == "0.0%" and rows[DEAD][-1] == "dead"


def test_explain_on_a_kernel_weight_gives_its_channels_health(killed: tuple[Path, Session],
                                                              capsys: pytest.CaptureFixture[str]) -> None:
    path, s = killed
    args = ["explain", str(ROOT / "glaze-defects"), f"L1.K[{DEAD},0,1,2]", "--resume", str(path)]
    assert main(args) == 0
    text = capsys.readouterr().out
    assert f"channel {DEAD}: ReLU passes on 0.0% of samples x positions" in text and "DEAD" in text
    assert main([*args[:2], "L1.b[2]", *args[3:], "--json"]) == 0
    doc = json.loads(capsys.readouterr().out)
    active, norms = reference_activity(s)
    assert doc["breakdown"] is None and doc["channel"]["index"] == 2
    assert doc["channel"]["active"] == pytest.approx(active[2], rel=1e-12)
    assert doc["channel"]["weight_norm"] == pytest.approx(norms[2], rel=1e-12)
    assert doc["analytic"] == s.analytic_slopes()[s.net.layout.lookup("L1.b[2]")]


def test_a_dense_weight_belongs_to_its_column_and_a_kernel_weight_to_its_channel() -> None:
    s = Session(load_setup(ROOT / "glaze-defects" / "model.toml"))
    look = s.net.layout.lookup
    assert unit_of(s.net, look("L1.K[6,0,2,1]")) == (0, 6) and unit_of(s.net, look("L1.b[4]")) == (0, 4)
    assert unit_of(s.net, look("L4.W[100,9]")) == (3, 9) and unit_of(s.net, look("L5.b[2]")) == (4, 2)
    report = layer_health(s.net, s.theta, s.setup.data.X, s.setup.data.Y, 0.1)
    unit = unit_health(report, s.net, 3, 9)
    assert unit is not None and unit.per == "unit"
    W = s.net.views(s.theta)[3]["W"]
    assert unit.weights == pytest.approx(float(np.linalg.norm(W[:, 9])), rel=1e-12)
    assert unit.active == pytest.approx(float(np.mean(s.net.forward(s.theta, s.setup.data.X)[3][1].Z[:, 9] > 0)))


def test_check_resumed_runs_at_the_checkpoints_dropout_masks(tmp_path: Path, capsys: pytest.CaptureFixture[str]) -> None:
    # fan-bearing has dropout: check --resume must see the training cost the session had at that step.
    s = Session(load_setup(ROOT / "fan-bearing" / "model.toml"), rate=0.05)
    s.step(7)
    path = s.save_checkpoint(tmp_path / "seven.safetensors")
    assert main(["check", str(ROOT / "fan-bearing"), "--resume", str(path), "--json"]) == 0
    doc = json.loads(capsys.readouterr().out)
    assert doc["cost"] == pytest.approx(s.history[7].train_cost, rel=1e-12)
    assert doc["cost"] != pytest.approx(s.net.cost(s.theta, s.setup.data.X, s.setup.data.Y), rel=1e-9)
