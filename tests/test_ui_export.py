"""The app on a model from another program: each weight's source in the table's title, and export from w.

Outside references: onnxruntime runs the ONNX file the app exports; the
safetensors library reads the state_dict it exports, applied in numpy as
PyTorch's documented ``Linear`` (``y = x A^T + b``, ``weight`` ``(out, in)``).
"""

from __future__ import annotations

from pathlib import Path
from typing import Any

import numpy as np
from onnx_graphs import run_onnxruntime
from safetensors.numpy import load_file
from textual.pilot import Pilot

from stepper.formats.model_file import load_setup
from stepper.session import Session
from stepper.ui.app import StepperApp
from stepper.ui.dialogs import AskScreen

ROOT = Path(__file__).resolve().parents[1] / "scenarios"


async def _answer(app: StepperApp, pilot: Pilot[Any], text: str) -> None:
    assert isinstance(app.screen, AskScreen), app.screen
    app.screen.query_one("#answer").value = text  # type: ignore[attr-defined]
    await pilot.press("enter")
    await pilot.pause()


def test_the_table_title_names_the_selected_weights_initializer(drive) -> None:
    session = Session(load_setup(ROOT / "glasshouse-vents" / "model.toml"))

    async def check(app: StepperApp, pilot: Pilot[Any], said: list[tuple[str, str]]) -> None:
        assert "L1.W[0,0] is hidden.weight[0,0] of net.onnx" in (app.table.border_title or "")
        await pilot.press("down")
        await pilot.pause()
        # L1.W[0,1]: input 0 to unit 1, stored (out, in) under transB = 1.
        assert "L1.W[0,1] is hidden.weight[1,0] of net.onnx" in (app.table.border_title or "")

    drive(session, check)


def test_w_exports_onnx_and_a_state_dict_without_saving_the_session(drive, tmp_path: Path) -> None:
    session = Session(load_setup(ROOT / "glasshouse-vents" / "model.toml"), rate=2.0)
    session.step(5)

    async def check(app: StepperApp, pilot: Pilot[Any], said: list[tuple[str, str]]) -> None:
        await pilot.press("w")
        await _answer(app, pilot, str(tmp_path / "trained.onnx"))
        await pilot.press("w")
        await _answer(app, pilot, f"{tmp_path / 'state.safetensors'} torch float64")
        await pilot.press("w")
        await _answer(app, pilot, str(ROOT / "glasshouse-vents" / "net.onnx"))  # an input: refused
        await pilot.press("y")
        await pilot.pause()
        assert any("is a file this model was read from" in message for message, _ in said)
        assert any(message.startswith(f"exported {tmp_path / 'trained.onnx'} (ONNX, float32)")
                   for message, _ in said)

    drive(session, check)
    assert session.dirty  # an export is not a save of the session
    X = session.setup.data.X
    ours = session.net.predict(session.theta, X)
    np.testing.assert_allclose(run_onnxruntime(tmp_path / "trained.onnx", X), ours, rtol=1e-5, atol=1e-6)
    tensors = load_file(str(tmp_path / "state.safetensors"))
    assert tensors["hidden.weight"].dtype == np.float64 and tensors["hidden.weight"].shape == (6, 4)
    hidden = np.tanh(X @ tensors["hidden.weight"].T + tensors["hidden.bias"])
    out = 1.0 / (1.0 + np.exp(-(hidden @ tensors["vent.weight"].T + tensors["vent.bias"])))
    np.testing.assert_allclose(out, ours, rtol=1e-12)
