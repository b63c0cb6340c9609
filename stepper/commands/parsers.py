"""Every subcommand's options, in one module that imports neither numpy nor Textual.

``stepper --help``, ``stepper check --help`` and an argument error are
answered from these parsers alone: a subcommand's module (``stepper/commands/NAME.py``,
which imports the numeric core) is imported only when its handler runs, after
the arguments parsed (see :func:`_handler`). The options several subcommands
share, the argument types and the choices are in :mod:`stepper.commands.options`.

To add a subcommand: a function ``add_NAME(subs)`` here, ending in
``p.set_defaults(handler=_handler("NAME"))``, an entry in :data:`PARSERS` and in
``stepper.cli.COMMANDS``, and ``handle(args) -> int`` in ``stepper/commands/NAME.py``.
"""

from __future__ import annotations

import argparse
import math
from importlib import import_module
from typing import TYPE_CHECKING, Any, Callable

from stepper.commands.options import (
    DTYPES,
    INPUT_SAMPLES,
    LAYOUTS,
    RATE_TEST_STEPS,
    SLICE_POINTS,
    SPLITS,
    THRESHOLD,
    add_model_argument,
    add_resume_option,
    add_samples_option,
    add_session_options,
    add_slope_options,
    add_step_options,
    add_training_options,
    path,
    positive_float,
    positive_int,
    whole,
)

if TYPE_CHECKING:
    from pathlib import Path

#: Rate for check's layer health when neither --rate nor a checkpoint gives one (common practice).
HEALTH_RATE = 0.1
#: Rate of slice's one step (and explain's weights' default) when neither --rate nor a checkpoint gives
#: one (common practice, no published source).
DEFAULT_RATE = 0.1
#: Size of slice's plot in characters, by default and at most: far wider than any terminal, and a few
#: seconds at most (plotext took 86 s and 15 GB for 5000x5000 and aborted at 100000x100000).
PLOT_SIZE = (76, 24)
MAX_PLOT_SIZE = (1000, 400)
#: How samples orders its rows: largest loss first, or as the data file has them.
ORDERS = ("loss", "line")


def _handler(command: str) -> Callable[[argparse.Namespace], int]:
    """The handler of ``command``, its module imported only when it runs."""

    def handle(args: argparse.Namespace) -> int:
        code: int = import_module(f"stepper.commands.{command}").handle(args)
        return code

    handle.__qualname__ = f"handle_{command}"
    return handle


def default_log_file() -> Path:
    """Where the app logs while it runs: the user's state folder (platformdirs), ``stepper/open.log``.

    On Linux that is ``$XDG_STATE_HOME/stepper/open.log`` (``~/.local/state`` by default).
    """
    from pathlib import Path

    import platformdirs

    return Path(platformdirs.user_state_path("stepper")) / "open.log"


def _budget(text: str) -> float:
    """A budget in milliseconds: a finite number, 0 or more."""
    try:
        value = float(text)
    except ValueError:
        raise argparse.ArgumentTypeError(f"{text!r} is not a number of milliseconds") from None
    if not (math.isfinite(value) and value >= 0):
        raise argparse.ArgumentTypeError(f"{text!r} must be 0 or more milliseconds")
    return value


def _steps(text: str) -> int:
    return whole(text, 0, "must be 0 or more")


def _threshold(text: str) -> float:
    try:
        value = float(text)
    except ValueError:
        raise argparse.ArgumentTypeError(f"{text!r} is not a number") from None
    if not 0.0 < value < 1.0:
        raise argparse.ArgumentTypeError(f"{text!r} must be between 0 and 1")
    return value


def _at_least_two(text: str) -> int:
    value = positive_int(text)
    if value < 2:
        raise argparse.ArgumentTypeError(f"{text!r} must be at least 2")
    return value


def _size(text: str) -> tuple[int, int]:
    parts = text.lower().split("x")
    try:
        width, height = (int(p) for p in parts)
    except ValueError:
        raise argparse.ArgumentTypeError(f"{text!r} is not a size like 76x24") from None
    if width < 30 or height < 10:
        raise argparse.ArgumentTypeError(f"{text!r} is too small (at least 30x10)")
    if width > MAX_PLOT_SIZE[0] or height > MAX_PLOT_SIZE[1]:
        raise argparse.ArgumentTypeError(
            f"{text!r} is too large (at most {MAX_PLOT_SIZE[0]}x{MAX_PLOT_SIZE[1]} characters)")
    return width, height


def add_open(subs: Any) -> None:
    p = subs.add_parser(
        "open",
        help="open the app: every weight's slopes, a cost plot, descent by hand (the default)",
        description="Open the terminal app on a model: a table of every weight with its analytic "
        "and numeric slope, a cost plot, and keys to step, change the rate, freeze, perturb, undo "
        "and save. Press ? in the app for the list of keys.",
    )
    add_model_argument(p)
    add_resume_option(p, help="start from a checkpoint (its weights, settings and cost history)")
    add_step_options(p, "to start with")
    add_training_options(p)
    add_samples_option(p, help="train on the first N training samples only (not with --journal)")
    p.add_argument("--journal", type=path, default=None, metavar="PATH",
                   help="append every operation to this journal file, for stepper replay (default: "
                   "a new journal-<time>.jsonl beside the checkpoints)")
    p.add_argument("--no-journal", action="store_true", help="keep no journal")
    p.add_argument("--noise", type=positive_float, default=0.01, metavar="SCALE",
                   help="standard deviation of the noise the perturb keys add (default 0.01)")
    p.add_argument("--check-every-step", action="store_true",
                   help="recompute the numeric slopes after every step (a key turns it on and off)")
    p.add_argument("--numeric-budget", type=_budget, default=50.0, metavar="MS",
                   help="milliseconds a numeric pass may take to be redone by itself after every change "
                   "(default 50; 0: only when asked, with #)")
    p.add_argument("--log", type=path, default=None, metavar="PATH",
                   help="log file while the app runs (default: open.log in the user's state folder, "
                   "~/.local/state/stepper on Linux)")
    p.set_defaults(handler=_handler("open"))


def add_check(subs: Any) -> None:
    p = subs.add_parser(
        "check",
        help="check every slope against finite differences (exit 1 unless every one agrees)",
        description="Compute each weight's slope by backpropagation and by finite "
        "differences, and report where they disagree. Exit code: 0 every slope agrees "
        "(slopes at a kink are not judged), 1 some disagree, are only doubtful or cannot be resolved "
        "at this step size, 2 bad input.",
    )
    add_model_argument(p)
    add_slope_options(p)
    add_resume_option(p, help="check the slopes at a checkpoint's weights instead of the model's start")
    p.add_argument("--rate", type=positive_float, default=None, metavar="R",
                   help=f"rate for the layer health's update-to-weight ratios (default {HEALTH_RATE}, "
                   "common practice, or the checkpoint's with --resume)")
    p.add_argument("--input-samples", type=positive_int, default=INPUT_SAMPLES, metavar="N",
                   help=f"samples on which custom layers' input slopes are checked (default {INPUT_SAMPLES})")
    p.add_argument("--weights", default=None, metavar="SPEC",
                   help="check only some weights: a share (1%%), a count (500), or a name pattern "
                   "(L2.*, L1.b[*]); a share or count is a seeded random draw from every array "
                   "(default: every weight, or none with --directions)")
    p.add_argument("--directions", type=positive_int, default=None, metavar="K",
                   help="check each parameter array along K random directions (2K cost evaluations "
                   "per array): a quick check of the whole model")
    p.add_argument("--seed", type=int, default=0,
                   help="seed of the random weights of --weights and of the --directions (default 0)")
    p.add_argument("--json", action="store_true", help="print one JSON document instead of a table")
    p.add_argument("--worst", type=positive_int, default=None, metavar="N",
                   help="list only the N weights with the largest relative error")
    p.add_argument("--problems-only", action="store_true",
                   help="list only the weights whose verdict is not agree (table and JSON)")
    p.set_defaults(handler=_handler("check"))


def add_run(subs: Any) -> None:
    p = subs.add_parser(
        "run",
        help="make gradient-descent steps without the app, optionally saving a checkpoint",
        description="Step gradient descent headless. Ctrl-C stops after the current step "
        "(and still saves with --save). A cost that runs away stops the run, keeping its steps "
        "(--runaway-growth, --runaway-rises, --run-on). Exit code: 0 ok, 1 a step was refused "
        "as divergent or the cost ran away, 2 bad input.",
    )
    add_model_argument(p)
    p.add_argument("--steps", type=_steps, default=100, metavar="N",
                   help="number of updates (default 100; 0 makes none and reports the state)")
    add_session_options(p, "for the run")
    p.add_argument("--save", type=path, default=None, metavar="PATH", help="write a checkpoint at the end")
    p.add_argument("--journal", type=path, default=None, metavar="PATH",
                   help="append every operation to this journal file (for stepper replay)")
    p.add_argument("--plot", default=None, metavar="FILE",
                   help="write histograms of each layer's weights, slopes, last updates and activations "
                   "at the end, as plain text ('-' for standard output)")
    p.add_argument("--json", action="store_true", help="print one JSON document at the end")
    p.set_defaults(handler=_handler("run"))


def add_replay(subs: Any) -> None:
    p = subs.add_parser(
        "replay",
        help="rebuild a session from its journal (after a crash) and save it as a checkpoint",
        description="Re-run every operation recorded in a journal, starting from the model "
        "file the journal names, and report (and optionally save) the resulting state. "
        "CAUTION: the model file may name custom layers, whose Python code replay runs; "
        "replay lists them first, and runs code that is not in the model file's own folder "
        "only with --run-code. Ctrl-C stops a long replay (and still saves with --save).",
    )
    p.add_argument("journal", type=path, help="journal file (.jsonl)")
    p.add_argument("--model", type=path, default=None,
                   help="model file to start from (default: the one the journal names)")
    p.add_argument("--save", type=path, default=None, metavar="PATH", help="write the rebuilt state as a checkpoint")
    p.add_argument("--force", action="store_true",
                   help="replay even if the model file, its data or code, or a loaded checkpoint has changed")
    p.add_argument("--run-code", action="store_true",
                   help="allow running custom-layer code that is not in the model file's folder")
    p.set_defaults(handler=_handler("replay"))


def add_slice(subs: Any) -> None:
    p = subs.add_parser(
        "slice",
        help="sweep one weight with the others fixed: cost, tangent, curvature, and the rate it allows",
        description="Hold every other weight fixed and sweep one weight around its value. Prints the "
        "cost, the analytic slope (the tangent), the curvature (a numeric second derivative) and what "
        "rate x curvature implies for plain gradient descent; --plot writes the picture as text.",
    )
    add_model_argument(p)
    p.add_argument("weight", help="the weight's name, e.g. L1.W[0,2] or L2.b[0]")
    p.add_argument("--rate", type=positive_float, default=None, metavar="R",
                   help=f"descent rate for the step and the verdict (default {DEFAULT_RATE}, "
                   "or the checkpoint's)")
    p.add_argument("--span", type=positive_float, default=None, metavar="S",
                   help="sweep the weight over value +- S (default: max(1, |value|, 1.5 |rate x slope|))")
    p.add_argument("--points", type=_at_least_two, default=SLICE_POINTS, metavar="N",
                   help=f"number of sweep points (default {SLICE_POINTS})")
    add_samples_option(p)
    add_resume_option(p, help="take the weights (and rate) from a checkpoint instead of the model's start")
    p.add_argument("--plot", default=None, metavar="FILE",
                   help="write the plot as plain text to FILE ('-' for standard output)")
    p.add_argument("--size", type=_size, default=PLOT_SIZE, metavar="WxH",
                   help=f"plot size in characters (default {PLOT_SIZE[0]}x{PLOT_SIZE[1]})")
    p.add_argument("--json", action="store_true", help="print one JSON document instead of text")
    p.set_defaults(handler=_handler("slice"))


def add_explain(subs: Any) -> None:
    p = subs.add_parser(
        "explain",
        help="take one weight's slope apart: error signal x activation slope x input, per sample",
        description="Show the factors whose product, summed over samples, is one weight's slope: the "
        "error signal at the unit it feeds, that unit's activation slope, and the input it carries; "
        "averaged over samples and for one sample, with the usual reasons a slope vanishes or explodes.",
    )
    add_model_argument(p)
    p.add_argument("weight", help="the weight's name, e.g. L1.W[0,2] or L2.b[0]")
    p.add_argument("--sample-index", type=int, default=None, metavar="K",
                   help="show training sample K (0-based) on its own (default: the one that "
                   "contributes most)")
    add_samples_option(p)
    add_resume_option(p, help="take the weights from a checkpoint instead of the model's start")
    p.add_argument("--json", action="store_true", help="print one JSON document instead of text")
    p.set_defaults(handler=_handler("explain"))


def add_export(subs: Any) -> None:
    p = subs.add_parser(
        "export",
        help="write the weights as ONNX, or as safetensors in PyTorch's or Stepper's layout",
        description="Write a model's weights (its starting ones, or a checkpoint's with --resume) for "
        "another program: an ONNX file of the whole network that onnxruntime runs, or a safetensors "
        "file in PyTorch's layout (the names and arrangement the weights came in, or an nn.Sequential's "
        "0.weight (out, in), 0.bias, ...) or in Stepper's own (L1.W (in, out), L1.b). The format follows "
        "the suffix of --to. Exit code: 0 written, 2 bad input.",
    )
    add_model_argument(p)
    p.add_argument("--resume", type=path, default=None, metavar="CK", help="the weights of this checkpoint")
    p.add_argument("--to", type=path, required=True, metavar="PATH", help="the file to write: .onnx or .safetensors")
    p.add_argument("--layout", choices=LAYOUTS, default=None,
                   help="safetensors only: torch (default) or stepper")
    p.add_argument("--dtype", choices=DTYPES, default=None,
                   help="float type written (default: the one the weights came in; float64 for Stepper's own)")
    p.set_defaults(handler=_handler("export"))


def add_samples(subs: Any) -> None:
    p = subs.add_parser(
        "samples",
        help="the loss of every data row (sample), worst first, with prediction, target and metrics",
        description="List the rows of the data with their loss, the network's output and the target, "
        "the worst first; then the task's metrics (accuracy and confusion matrix, precision and recall, "
        "or R2 and mean absolute error) on the training and validation rows.",
    )
    add_model_argument(p)
    p.add_argument("--resume", type=path, default=None, metavar="CK", help="take the weights from a checkpoint")
    p.add_argument("--worst", type=positive_int, default=10, metavar="N", help="list the N worst rows (default 10)")
    p.add_argument("--all", action="store_true", help="list every row")
    p.add_argument("--split", choices=SPLITS, default="both",
                   help="training rows, validation rows or both (default both)")
    p.add_argument("--sort", choices=ORDERS, default="loss",
                   help="order of the listed rows: largest loss first (default) or file line")
    p.add_argument("--threshold", type=_threshold, default=THRESHOLD, metavar="T",
                   help=f"for yes/no outputs: an output at or above T says yes (default {THRESHOLD})")
    p.add_argument("--json", action="store_true", help="print one JSON document instead of text")
    p.set_defaults(handler=_handler("samples"))


def add_rates(subs: Any) -> None:
    p = subs.add_parser(
        "rates",
        help="rate range test: a few steps at each of several rates from one state; which ends lowest",
        description="From the model's start (or --resume CK), make --steps updates at each of --count "
        "rates spaced evenly on a log axis from --low to --high, each from the same state, and report the "
        "cost each reaches. Nothing is saved: the test changes no state. Slopes come from backpropagation "
        "(whatever --slopes says), and no runaway rule stops a rate early: each makes every step it can.",
    )
    add_model_argument(p)
    p.add_argument("--low", type=positive_float, default=None, metavar="R",
                   help="lowest rate (default: the rate / 100)")
    p.add_argument("--high", type=positive_float, default=None, metavar="R",
                   help="highest rate (default: the rate x 10)")
    p.add_argument("--count", type=positive_int, default=None, metavar="N", help="how many rates (default 8)")
    p.add_argument("--steps", type=positive_int, default=RATE_TEST_STEPS, metavar="K",
                   help=f"steps at each rate (default {RATE_TEST_STEPS})")
    add_session_options(p, "around which the rates are spread", runaway=False)
    p.add_argument("--plot", default=None, metavar="FILE",
                   help="write the cost against the rate (log axis) as plain text ('-' for standard output)")
    p.add_argument("--json", action="store_true", help="print one JSON document instead of text")
    p.set_defaults(handler=_handler("rates"))


def add_diff(subs: Any) -> None:
    p = subs.add_parser(
        "diff",
        help="compare two checkpoints: costs, each layer's change, the weights that moved most",
        description="Compare the weights of A and B (checkpoints of one model; a model file, folder or "
        "bundled name stands for its starting weights): the cost of each, each layer's norm of change, "
        "the weights that moved most, and the cosine between the change and the slope.",
    )
    p.add_argument("points", nargs="+", metavar="A B",
                   help="the earlier and the later checkpoint (a model stands for its starting weights); "
                   "with --resume A, only B")
    p.add_argument("--resume", default=None, metavar="CK", help="the earlier checkpoint A (then give only B)")
    p.add_argument("--model", default=None, metavar="MODEL",
                   help="the model both belong to (default: the one the checkpoints name)")
    p.add_argument("--top", type=positive_int, default=10, metavar="N", help="list the N weights that moved most")
    p.add_argument("--json", action="store_true", help="print one JSON document instead of text")
    p.set_defaults(handler=_handler("diff"))


#: Each subcommand's parser, by name.
PARSERS: dict[str, Callable[[Any], None]] = {
    "open": add_open,
    "check": add_check,
    "run": add_run,
    "replay": add_replay,
    "slice": add_slice,
    "explain": add_explain,
    "export": add_export,
    "samples": add_samples,
    "rates": add_rates,
    "diff": add_diff,
}
