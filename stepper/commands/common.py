"""Options and helpers shared by several subcommands."""

from __future__ import annotations

import argparse
import math
import sys
from typing import Any

import numpy as np

from stepper.core.numeric import METHODS
from stepper.errors import UsageError
from stepper.formats.model_file import Setup, load_setup
from stepper.scenarios import resolve_model


def add_model_argument(parser: argparse.ArgumentParser) -> None:
    parser.add_argument(
        "model",
        nargs="?",
        help="model file (TOML), a scenario folder, or a bundled scenario name; "
        "default: the bundled default scenario",
    )


def add_slope_options(parser: argparse.ArgumentParser) -> None:
    parser.add_argument("--method", choices=METHODS, default="central",
                        help="finite differences: central (default) or forward")
    parser.add_argument("--step", type=positive_float, default=None, metavar="H",
                        help="finite-difference step h (default: cube root of machine "
                        "epsilon for central, square root for forward)")
    parser.add_argument("--samples", type=positive_int, default=None, metavar="N",
                        help="use only the first N training samples")


def positive_float(text: str) -> float:
    try:
        value = float(text)
    except ValueError:
        raise argparse.ArgumentTypeError(f"{text!r} is not a number") from None
    if not math.isfinite(value) or value <= 0:
        raise argparse.ArgumentTypeError(f"{text!r} must be a positive number")
    return value


def positive_int(text: str) -> int:
    try:
        value = int(text)
    except ValueError:
        raise argparse.ArgumentTypeError(f"{text!r} is not a whole number") from None
    if value < 1:
        raise argparse.ArgumentTypeError(f"{text!r} must be at least 1")
    return value


def load(args: argparse.Namespace) -> Setup:
    return load_setup(resolve_model(args.model))


def sample_limit(setup: Setup, limit: int | None) -> tuple[np.ndarray[Any, Any], np.ndarray[Any, Any]]:
    """Training inputs and targets, cut to the first ``limit`` samples."""
    X, Y = setup.data.X, setup.data.Y
    if limit is not None:
        if limit > X.shape[0]:
            raise UsageError(f"--samples {limit}: the training set has only {X.shape[0]} samples")
        X, Y = X[:limit], Y[:limit]
    return X, Y


def fmt(value: float, width: int = 12) -> str:
    """A number in a fixed-width, sign-aligned scientific form."""
    if value != value:
        return "-".rjust(width)
    return f"{value: .{max(width - 8, 3)}e}".rjust(width)


def progress_printer(label: str) -> Any:
    """A callback ``(done, total)`` that draws a one-line bar on a terminal, nothing otherwise."""
    stream = sys.stderr
    if not stream.isatty():
        return None
    state = {"last": -1}

    def show(done: int, total: int) -> None:
        pct = 100 * done // max(total, 1)
        if pct == state["last"]:
            return
        state["last"] = pct
        filled = pct // 4
        stream.write(f"\r{label} [{'#' * filled}{'.' * (25 - filled)}] {pct:3d}%")
        if done >= total:
            stream.write("\r" + " " * (len(label) + 35) + "\r")
        stream.flush()

    return show
