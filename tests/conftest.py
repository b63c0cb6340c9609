"""Shared fixtures: model files in a temporary folder, small seeded networks, and the app run headless."""

from __future__ import annotations

import asyncio
import os
from pathlib import Path
from typing import Any, Awaitable, Callable, Sequence

import numpy as np
import pytest
from hypothesis import settings
from textual.pilot import Pilot

from stepper.core.activations import ACTIVATIONS
from stepper.core.layers import Dense
from stepper.core.network import Network
from stepper.session import Session

# In CI the property tests draw the same examples every run, so a landing never
# depends on luck; run them locally (where CI is unset) to explore new inputs.
settings.register_profile("ci", derandomize=True)
if os.environ.get("CI"):
    settings.load_profile("ci")
from stepper.ui.app import StepperApp


@pytest.fixture
def write_model(tmp_path: Path) -> Callable[..., Path]:
    """Write a model file, and optionally its CSV, into ``tmp_path``; returns the model's path.

    Usage: ``write_model(toml_text, csv_text, name="model.toml", csv_name="data.csv")``.
    """

    def write(toml_text: str, csv_text: str | None = None, name: str = "model.toml",
              csv_name: str = "data.csv") -> Path:
        path = tmp_path / name
        path.write_text(toml_text, encoding="utf-8")
        if csv_text is not None:
            (tmp_path / csv_name).write_text(csv_text, encoding="utf-8")
        return path

    return write


@pytest.fixture
def dense_net() -> Callable[..., tuple[Network, np.ndarray]]:
    """Build a network of dense layers with seeded normal weights.

    Usage: ``net, theta = dense_net(n_in, [(units, activation), ...], loss, seed=0, scale=0.6)``;
    a third tuple entry ``False`` drops that layer's bias. Biases are drawn too, so
    they take part in every check.
    """

    def build(n_in: int, spec: Sequence[tuple], loss: str, seed: int = 0,
              scale: float = 0.6) -> tuple[Network, np.ndarray]:
        layers = []
        width = n_in
        for entry in spec:
            units, activation = entry[0], entry[1]
            bias = entry[2] if len(entry) > 2 else True
            layers.append(Dense(width, units, ACTIVATIONS[activation], bias))
            width = units
        net = Network(n_in, layers, loss)
        theta = np.random.default_rng(seed).normal(0.0, scale, net.n_params)
        return net, theta

    return build


#: What a test runs inside the app: ``check(app, pilot, said)``, with ``said`` the notifications so far.
AppCheck = Callable[[StepperApp, Pilot[Any], list[tuple[str, str]]], Awaitable[None]]


@pytest.fixture
def drive() -> Callable[..., StepperApp]:
    """Run the real app headless around one check; returns the app once it has closed.

    Usage: ``drive(session, check, size=(100, 30), numeric_budget=0.0)``; the
    budget (seconds) is the app's for automatic numeric passes: off (0) unless
    a test asks, so that no test depends on the speed of a shared machine
    (tests of the automatic passes give a budget far above or below a pass's
    time). Animations are off (the
    environment variable is read once, at import), the first screen settles
    (one pilot pause) before ``check(app, pilot, said)`` runs, and ``said``
    collects every notification as ``(message, severity)``.
    """

    def run(session: Session, check: AppCheck, size: tuple[int, int] = (100, 30),
            numeric_budget: float = 0.0) -> StepperApp:
        app = StepperApp(session, numeric_budget=numeric_budget)
        app.animation_level = "none"
        said: list[tuple[str, str]] = []
        original = app.notify

        def notify(message: str, **kwargs: Any) -> None:
            said.append((message, kwargs.get("severity", "information")))
            original(message, **kwargs)

        app.notify = notify  # type: ignore[method-assign]

        async def main() -> None:
            async with app.run_test(size=size) as pilot:
                await pilot.pause()
                await check(app, pilot, said)

        asyncio.run(main())
        return app

    return run


def _two_input_csv() -> str:
    """Two inputs ``a``, ``b`` and a target ``y = sin(a) + 0.5 b`` (rounded), 30 seeded rows; invented for tests."""
    rng = np.random.default_rng(9)
    rows = ["a,b,y"] + [f"{a:.3f},{b:.3f},{np.sin(a) + 0.5 * b:.3f}" for a, b in rng.normal(size=(30, 2))]
    return "\n".join(rows) + "\n"


#: A model around one custom layer: tanh (2 units), the custom layer (3 units), identity (1 unit), on
#: ``_two_input_csv``; ``{file}`` and ``{cls}`` name the layer, ``{extra}`` adds lines to its table.
CUSTOM_MODEL = '''\
loss = "mean_squared_error"

[data]
file = "data.csv"
inputs = ["a", "b"]
targets = ["y"]

[init]
scheme = "glorot_uniform"
seed = 2

[[layers]]
units = 2
activation = "tanh"

[[layers]]
type = "custom"
file = "{file}"
class = "{cls}"
units = 3
{extra}

[[layers]]
units = 1
activation = "identity"
'''


@pytest.fixture
def custom_model(tmp_path: Path) -> Callable[..., Path]:
    """Write data.csv, a custom layer's source and model.toml around it into ``tmp_path``; returns the model.

    Usage: ``custom_model(source, file, cls, extra="")``: ``source`` is the layer's
    Python text, written to ``file``; ``cls`` is its class; ``extra`` adds lines
    to the layer's table (``options = {...}``). Calling it again rewrites the files.
    """

    def write(source: str, file: str, cls: str, extra: str = "") -> Path:
        (tmp_path / file).write_text(source, encoding="utf-8")
        (tmp_path / "data.csv").write_text(_two_input_csv(), encoding="utf-8")
        model = tmp_path / "model.toml"
        model.write_text(CUSTOM_MODEL.format(file=file, cls=cls, extra=extra), encoding="utf-8")
        return model

    return write
