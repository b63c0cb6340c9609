"""Pressing keys in the headless app and answering its dialogs, for the Pilot tests of the UI."""

from __future__ import annotations

from typing import Any

from textual.pilot import Pilot

from stepper.ui.app import StepperApp
from stepper.ui.dialogs import AskScreen


async def press(app: StepperApp, pilot: Pilot[Any], *keys: str) -> None:
    """Press keys one by one, letting workers finish and the screen settle after each."""
    for key in keys:
        await pilot.press(key)
        if app.workers:
            # A job's last update reaches the app through call_from_thread: let it land.
            await app.workers.wait_for_complete()
        await pilot.pause()


async def answer(app: StepperApp, pilot: Pilot[Any], text: str) -> None:
    """Type ``text`` into the open AskScreen (replacing its proposal) and press enter."""
    assert isinstance(app.screen, AskScreen), app.screen
    app.screen.query_one("#answer").value = text  # type: ignore[attr-defined]
    await press(app, pilot, "enter")
