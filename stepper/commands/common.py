"""Helpers shared by several subcommands' handlers: loading the model, weights from a checkpoint,
progress bars, plots written to a file.

The options themselves, the command-line vocabulary, are in
:mod:`stepper.commands.options` (imported without the numeric core, so that
``--help`` is quick).
"""

from __future__ import annotations

import argparse
import math
import os
import sys
from contextlib import contextmanager
from pathlib import Path
from typing import TYPE_CHECKING, Any, Callable, Iterator, Sequence

import numpy as np

from stepper.commands.graph_data import load_graph_setup, wants_graph
from stepper.errors import UsageError
from stepper.formats.atomic import write_atomic
from stepper.formats.model_file import Setup, load_setup
from stepper.formats.outputs import check_output
from stepper.scenarios import resolve_model
from stepper.session.runaway import RUN_ON, RunawayRule

if TYPE_CHECKING:
    from stepper.session import Session
    from stepper.core.network import Network
    from stepper.formats.checkpoint import CheckpointData












def runaway_rule(args: argparse.Namespace) -> RunawayRule:
    """The runaway rule the step options ask for."""
    if args.run_on:
        return RUN_ON
    return RunawayRule(args.runaway_growth, args.runaway_rises or None)


def apply_step_options(session: Session, args: argparse.Namespace) -> None:
    """``--rate``, ``--rule``, ``--slopes`` and ``--batch`` where they differ from the session's (each undoable).

    A batch larger than the training set is the full batch. The runaway rule
    is a preference, set without a trace in undo or the journal.
    """
    if hasattr(args, "run_on"):
        session.set_runaway(runaway_rule(args))
    if args.rate is not None and args.rate != session.rate:
        session.set_rate(args.rate)
    if args.rule is not None and args.rule != session.rule:
        session.set_rule(args.rule)
    if args.slopes is not None and args.slopes != session.slope_source:
        session.set_slope_source(args.slopes)
    if args.batch is not None:
        n = session.setup.data.n_train
        batch = None if args.batch >= n else args.batch
        if batch != session.batch_size:
            session.set_batch_size(batch)














def load(args: argparse.Namespace) -> Setup:
    model = resolve_model(args.model)
    if wants_graph(args, model):
        return load_graph_setup(args, model)
    return load_setup(model)


def resumed_weights(setup: Setup, checkpoint: Path | None, rate: float | None,
                    default_rate: float) -> tuple[np.ndarray[Any, Any], float, Network]:
    """The weights to start from, the rate and the network as it trains there: the model's or ``--resume``'s.

    Returns ``(theta, rate, net)``: ``theta`` of shape ``(n_params,)`` is the model's
    initial values, or the checkpoint's (checked against the model's layout);
    the rate is ``rate`` when given, else the checkpoint's, else ``default_rate``;
    ``net`` is the model's network as it trains at the checkpoint's step with its
    running statistics (its dropout masks are that step's, as in the app), or at
    the start.
    """
    theta = setup.theta0
    net = setup.network
    saved_rate: float | None = None
    if checkpoint is not None:
        from stepper.formats.checkpoint import load_checkpoint

        data = load_checkpoint(checkpoint, net.layout, net.state_layout)
        theta = data.theta
        value = data.meta.get("rate")
        if isinstance(value, (int, float)) and math.isfinite(value) and value > 0:
            saved_rate = float(value)
        net = net.at(True, saved_step(setup, checkpoint, data), data.state)
    chosen = rate if rate is not None else saved_rate if saved_rate is not None else default_rate
    return theta, chosen, net


def saved_step(setup: Setup, checkpoint: Path, data: CheckpointData) -> int:
    """The update count checkpoint ``data`` (read from ``checkpoint``) was saved at, checked against the model.

    Read only where the network's cost depends on it (dropout masks, running
    statistics); 0 otherwise.
    """
    net = setup.network
    if not (net.varies_by_step or net.has_state):
        return 0
    from stepper.formats.saved_state import read_state
    from stepper.session.core import SLOPE_SOURCES

    return read_state(checkpoint, data, net.layout, setup.data.n_train, SLOPE_SOURCES).step_count


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


@contextmanager
def progress_bar(label: str, lines: bool = False) -> Iterator[Callable[[int, int], None]]:
    """A callback ``(done, total)`` that shows progress on stderr while the block runs.

    On a terminal, a ``rich.progress`` bar that disappears when done; otherwise
    nothing, or with ``lines`` a line at every tenth of the way (for logs of a
    long ``stepper run``).
    """
    stream = sys.stderr
    if not stream.isatty():
        if not lines:
            yield lambda done, total: None
            return
        marks: dict[int, set[int]] = {}

        def line(done: int, total: int) -> None:
            wanted = marks.setdefault(total, {max(1, total * k // 10) for k in range(1, 11)})
            if done in wanted:
                stream.write(f"{label} {done}/{total}\n")
                stream.flush()

        yield line
        return
    from rich.console import Console
    from rich.progress import BarColumn, MofNCompleteColumn, Progress, TextColumn, TimeRemainingColumn

    with Progress(TextColumn("{task.description}"), BarColumn(), MofNCompleteColumn(), TimeRemainingColumn(),
                  console=Console(file=stream), transient=True) as progress:
        task = progress.add_task(label, total=None)

        def update(done: int, total: int) -> None:
            progress.update(task, completed=done, total=total)

        yield update


class StopFlag:
    """A SIGINT handler: the first Ctrl-C asks to stop after the current step, a second interrupts at once."""

    def __init__(self, what: str = "") -> None:
        self.requested = False
        self.what = what

    def __call__(self, signum: int, frame: Any) -> None:
        if self.requested:
            raise KeyboardInterrupt
        self.requested = True
        print(f"\nstopping {self.what}after the current step (Ctrl-C again to stop at once)", file=sys.stderr)


def write_plot(target: str, text: str, *, json_output: bool, inputs: Sequence[Path | None] = ()) -> None:
    """Write a plot's text to the file ``target``, or to standard output for ``-``.

    ``-`` with ``json_output`` is refused (both would go to standard output), and
    so is a file that is one of ``inputs`` (an output never overwrites an input).
    The file is replaced atomically.
    """
    if target == "-":
        if json_output:
            raise UsageError("--plot - and --json both write to standard output; give --plot a file name")
        sys.stdout.write("\n" + text + "\n")
        return
    check_plot_target(target, inputs)
    path = Path(target)
    try:
        write_atomic(path, (text + "\n").encode("utf-8"))
    except OSError as exc:
        raise UsageError(f"--plot {target}: cannot be written ({exc.strerror or exc})") from None


def check_plot_target(target: str | None, inputs: Sequence[Path | None]) -> None:
    """Refuse a ``--plot`` file that is one of ``inputs`` (or another output); call it before long work."""
    if target is None or target == "-":
        return
    for source in inputs:
        if source is not None and _same_file(Path(target), Path(source)):
            raise UsageError(f"--plot {target}: is also an input ({source}); choose another file")
        if source is not None and Path(target).resolve() == Path(source).resolve():
            raise UsageError(f"--plot {target}: is also an output ({source}); choose another file")
    check_output(Path(target), [], "text", "--plot")  # never a link, a device or a FIFO


def _same_file(a: Path, b: Path) -> bool:
    try:
        return a.exists() and b.exists() and os.path.samefile(a, b)
    except OSError:
        return False
