"""The options several subcommands share, and the argument types, without the numeric core.

``stepper --help`` and a mistyped option must answer at once, so the parsers
(this module and :mod:`stepper.commands.parsers`) import only the standard
library: no numpy, no Textual. The choices the core, the session and the
file formats offer are spelled here again (a test compares each with its
source, tests/test_lean_start.py); a subcommand's handler, which does import
them, runs only after its arguments parsed.

The vocabulary is fixed here, so that every subcommand speaks it the same way:
``--resume CK`` starts from a checkpoint's weights, ``--samples N`` uses the
first N training samples, ``--delta H`` is the finite-difference step,
``--method`` central or forward differences.
"""

from __future__ import annotations

import argparse
import math
from typing import TYPE_CHECKING, Any

if TYPE_CHECKING:
    from pathlib import Path

# -- the choices offered elsewhere (each equal to its source; see the module docstring) --------------

#: stepper.core.numeric.METHODS
METHODS = ("central", "forward")
#: stepper.core.optimizers.RULES
RULES = ("gd", "momentum", "adam")
#: stepper.session.SLOPE_SOURCES
SLOPE_SOURCES = ("analytic", "numeric")
#: stepper.core.losses.LOSSES, its keys in order
LOSS_NAMES = ("half_squared_error", "mean_squared_error", "binary_cross_entropy", "categorical_cross_entropy")
#: stepper.session.runaway.GROWTH and RISES
GROWTH = 1e3
RISES = 30
#: stepper.core.input_slopes.DEFAULT_SAMPLES
INPUT_SAMPLES = 8
#: stepper.core.slice.DEFAULT_POINTS
SLICE_POINTS = 41
#: stepper.core.ratetest.DEFAULT_STEPS
RATE_TEST_STEPS = 50
#: stepper.core.metrics.THRESHOLD
THRESHOLD = 0.5
#: stepper.session.measures.SPLITS
SPLITS = ("both", "train", "validation")
#: stepper.formats.weights_export.LAYOUTS
LAYOUTS = ("torch", "stepper")
#: stepper.formats.weight_sources.DTYPES
DTYPES = ("float32", "float64")


# -- argument types -----------------------------------------------------------------------------------


def path(text: str) -> Path:
    """A file name as a ``pathlib.Path`` (pathlib is imported only when a path is given: a tenth of --help)."""
    from pathlib import Path

    return Path(text)


def positive_float(text: str) -> float:
    try:
        value = float(text)
    except ValueError:
        raise argparse.ArgumentTypeError(f"{text!r} is not a number") from None
    if not math.isfinite(value) or value <= 0:
        raise argparse.ArgumentTypeError(f"{text!r} must be a positive number")
    return value


def positive_int(text: str) -> int:
    return whole(text, 1, "must be at least 1")


def non_negative_int(text: str) -> int:
    return whole(text, 0, "must be 0 or more")


def whole(text: str, least: int, too_small: str) -> int:
    """``text`` as a whole number of at least ``least``; else an argparse error ending in ``too_small``."""
    try:
        value = int(text)
    except ValueError:
        raise argparse.ArgumentTypeError(f"{text!r} is not a whole number") from None
    if value < least:
        raise argparse.ArgumentTypeError(f"{text!r} {too_small}")
    return value


def not_negative(text: str) -> float:
    try:
        value = float(text)
    except ValueError:
        raise argparse.ArgumentTypeError(f"{text!r} is not a number") from None
    if not math.isfinite(value) or value < 0:
        raise argparse.ArgumentTypeError(f"{text!r} must be a number, 0 or more")
    return value


def _growth(text: str) -> float:
    value = positive_float(text)
    if value <= 1.0:
        raise argparse.ArgumentTypeError(f"{text!r} must be above 1")
    return value


def _rises(text: str) -> int:
    return whole(text, 0, "must be 0 (never) or more")


def _clip(text: str) -> float | str:
    if text.strip().lower() in ("off", "none"):
        return "off"
    return positive_float(text)


def _schedule(text: str) -> Any:
    # The schedule parser is pure Python (stepper/core/schedules.py imports no numpy).
    from stepper.core.schedules import ScheduleError, parse_schedule

    try:
        return parse_schedule(text)
    except ScheduleError as exc:
        raise argparse.ArgumentTypeError(f"{text!r}: {exc}") from None


# -- options shared by several subcommands ------------------------------------------------------------


def add_model_argument(parser: argparse.ArgumentParser) -> None:
    parser.add_argument(
        "model",
        nargs="?",
        help="model file (TOML), a scenario folder, a bundled scenario name, or an ONNX file "
        "(with --data, --targets, --loss); default: the bundled default scenario",
    )
    add_graph_data_options(parser)


def add_graph_data_options(parser: argparse.ArgumentParser) -> None:
    """``--data``, ``--targets``, ``--inputs``, ``--loss``: what a model file would give an ONNX file."""
    group = parser.add_argument_group(
        "an ONNX file named directly (instead of a model file)",
        "give the data and the loss that a model file would give; see README.md, Bring your own model")
    group.add_argument("--data", type=path, default=None, metavar="CSV", help="the data: a CSV file with a header row")
    group.add_argument("--targets", default=None, metavar="COLS",
                       help="target columns, comma-separated (one column of class numbers for a softmax output)")
    group.add_argument("--inputs", default=None, metavar="COLS",
                       help="input columns, comma-separated (default: every column that is not a target)")
    group.add_argument("--loss", choices=LOSS_NAMES, default=None, help="the loss")


def add_slope_options(parser: argparse.ArgumentParser) -> None:
    parser.add_argument("--method", choices=METHODS, default="central",
                        help="finite differences: central (default) or forward")
    parser.add_argument("--delta", type=positive_float, default=None, metavar="H",
                        help="finite-difference step h, absolute (default: cube root of machine "
                        "epsilon for central, square root for forward)")
    add_samples_option(parser)


def add_samples_option(parser: argparse.ArgumentParser, help: str = "use only the first N training samples") -> None:
    parser.add_argument("--samples", type=positive_int, default=None, metavar="N", help=help)


def add_resume_option(parser: argparse.ArgumentParser, help: str = "start from a checkpoint's weights "
                      "instead of the model's initial values") -> None:
    parser.add_argument("--resume", type=path, default=None, metavar="CHECKPOINT", help=help)


def add_step_options(parser: argparse.ArgumentParser, purpose: str, runaway: bool = True) -> None:
    """How steps are made, the same in ``open`` and ``run``: rate, rule, slopes, batch and its seed.

    With ``runaway``, also when a run of steps stops a runaway cost (leave it out
    for a command whose steps no runaway rule stops).
    """
    parser.add_argument("--rate", type=positive_float, default=None, metavar="R",
                        help=f"learning rate {purpose} (default 0.1, or the checkpoint's with --resume)")
    parser.add_argument("--rule", choices=RULES, default=None,
                        help=f"update rule {purpose} (default gd, or the checkpoint's)")
    parser.add_argument("--slopes", choices=SLOPE_SOURCES, default=None,
                        help="slopes from backpropagation (analytic, default) or finite differences (numeric)")
    parser.add_argument("--batch", type=positive_int, default=None, metavar="N",
                        help="mini-batches of N samples, drawn with a seeded shuffle (default: full batch)")
    parser.add_argument("--seed", type=non_negative_int, default=0,
                        help="seed for the mini-batch order and the noise (0 or more; default 0)")
    if not runaway:
        return
    parser.add_argument("--runaway-growth", type=_growth, default=GROWTH, metavar="F",
                        help=f"stop a run of steps once the cost exceeds F x its value at the run's start "
                        f"(default {GROWTH:g})")
    parser.add_argument("--runaway-rises", type=_rises, default=RISES, metavar="K",
                        help=f"stop a run of steps once the cost rose K steps in a row and is above its "
                        f"start (default {RISES}; 0: never)")
    parser.add_argument("--run-on", action="store_true",
                        help="no runaway rule: only a step that would be non-finite stops a run")


def add_training_options(p: argparse.ArgumentParser) -> None:
    """``--l2``, ``--weight-decay``, ``--clip-norm`` and ``--schedule`` (default: the model file's or checkpoint's)."""
    p.add_argument("--l2", type=not_negative, default=None, metavar="L",
                   help="L2 term (L/2) x sum of squared weights in the cost; 0 for none "
                   "(default: the model file's [training].l2, or the checkpoint's)")
    p.add_argument("--weight-decay", type=not_negative, default=None, metavar="D",
                   help="decoupled weight decay per step, theta -= factor x D x theta on weights "
                   "(AdamW with --rule adam); 0 for none")
    p.add_argument("--clip-norm", type=_clip, default=None, metavar="C",
                   help="scale the slopes down to global norm C before each step; 'off' for no clipping")
    p.add_argument("--schedule", type=_schedule, default=None, metavar="SPEC",
                   help="rate schedule: constant, step:every=N,factor=F, exponential:every=N,factor=F, "
                   "cosine:steps=N[,warmup=W][,floor=F][,restart=yes]")


def add_session_options(p: argparse.ArgumentParser, purpose: str, runaway: bool = True) -> None:
    """Everything that sets up a session to step: step options, ``--freeze``, ``--resume``, training options.

    ``runaway``: whether the runaway rule's options are offered (see ``add_step_options``).
    """
    add_step_options(p, purpose, runaway)
    p.add_argument("--freeze", action="append", default=[], metavar="PATTERN",
                   help="freeze parameters whose names match, e.g. 'L1.b[*]' (repeatable)")
    add_resume_option(p, help="start from a checkpoint (its weights, settings and cost history)")
    add_training_options(p)
