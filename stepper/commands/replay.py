"""``stepper replay``: rebuild a session's state from its journal."""

from __future__ import annotations

import argparse
import hashlib
import signal
import sys
from pathlib import Path
from typing import Any

from stepper.commands.common import StopFlag, progress_bar
from stepper.errors import CheckpointError, StepperError, UsageError
from stepper.formats import fields
from stepper.formats.journal import MAX_STEPS_PER_LINE, read_numbered_journal
from stepper.formats.model_file import declared_code, load_setup
from stepper.formats.outputs import check_output
from stepper.formats.reading import CHECKPOINT_LIMIT, read_limited
from stepper.session import Session




def _sha256(path: Path) -> str | None:
    try:
        return hashlib.sha256(read_limited(path, CHECKPOINT_LIMIT, CheckpointError)).hexdigest()
    except CheckpointError:
        return None


def check_inputs(journal: Path, header: dict[str, Any], model: Path, force: bool) -> None:
    """Refuse (unless ``force``) when the model file or any input the journal recorded has changed.

    Checked before the model is loaded, so a changed custom layer's code never runs.
    """
    if force:
        return
    if header.get("digest") is not None and _sha256(model) != header.get("digest"):
        raise CheckpointError(f"{journal}: the model file {model} has changed since the journal was written "
                              "(use --force to replay anyway)")
    for item in header.get("inputs", []):
        path = Path(item["path"])
        if _sha256(path) != item["sha256"]:
            state = "is missing" if not path.exists() else "has changed"
            raise CheckpointError(f"{journal}: the {item.get('role', 'input')} {path} {state} since the journal "
                                  "was written, so the replay would not rebuild the same state "
                                  "(use --force to replay anyway)")


def check_code(journal: Path, model: Path, run_code: bool) -> list[Path]:
    """The custom-layer files replay will run; refused when one is outside the model's folder and not allowed."""
    code = declared_code(model)
    home = model.resolve().parent
    outside = [path for path in code if path.resolve().parent != home]
    if outside and not run_code:
        raise UsageError(f"{journal}: the model file {model} runs custom-layer code outside its own folder "
                         f"({', '.join(str(p) for p in outside)}); read it, and add --run-code to run it")
    return code


def replay(journal: Path, model: Path | None = None, force: bool = False, run_code: bool = False,
           on_progress: Any = None, stop: Any = None) -> Session:
    """A session rebuilt from ``journal``; the journal itself is not written to.

    ``on_progress(done, total)`` hears of every line (and of the steps inside a
    long one); ``stop()`` returning True ends the replay early, after the
    current step, with the state rebuilt so far.
    """
    header, entries = read_numbered_journal(journal)
    model_path = model if model is not None else Path(str(header.get("model")))
    document = (header.get("start") or {}).get("document") if isinstance(header.get("start"), dict) else None
    graph = model is None and isinstance(document, dict)
    # Checked before the model is loaded: a changed input, or code outside the model's folder, never runs.
    check_inputs(journal, dict(header, digest=None) if graph else header, model_path, force)
    check_code(journal, model_path, run_code)
    try:
        if graph and isinstance(document, dict):
            # An ONNX file that was opened with --data, --targets and --loss: the options built this document.
            from stepper.commands.graph_data import graph_setup

            setup = graph_setup(document, model_path)
        else:
            setup = load_setup(model_path)
    except StepperError as exc:
        exc.message = f"{journal}: line 1: the model the journal names: {exc.message}"
        raise
    if graph and setup.digest != header.get("digest") and not force:
        raise CheckpointError(f"{journal}: the model {setup.path} has changed since the journal was written "
                              "(use --force to replay anyway)")
    start = header.get("start") or {}
    try:
        batch = start.get("batch_size")
        session = Session(setup, rate=float(start.get("rate", 0.1)), rule=str(start.get("rule", "gd")),
                          seed=int(start.get("seed", 0)),
                          slope_source=str(start.get("slope_source", "analytic")),
                          batch_size=None if batch is None else int(batch))
    except (AttributeError, TypeError, ValueError, StepperError) as exc:
        raise CheckpointError(f"{journal}: line 1: the starting settings are not valid ({exc})") from None
    total = len(entries)
    for done, (number, entry) in enumerate(entries):
        if stop is not None and stop():
            break
        try:
            if entry.get("op") == "step" and isinstance(entry.get("n"), int) and entry["n"] > 1 and stop is not None:
                _long_step(session, entry, force, stop)
            else:
                session.apply(entry, force)
        except StepperError as exc:
            # Same error (and exit code), told where in the journal it happened.
            exc.message = f"{journal}: line {number}: {exc.message}"
            raise
        if on_progress is not None:
            on_progress(done + 1, total)
    return session


def _long_step(session: Session, entry: dict[str, Any], force: bool, stop: Any) -> None:
    """A step line, stoppable between its steps: checked as any entry, then stepped in pieces."""
    n = fields.whole(entry["n"], CheckpointError, "step: n", 1, MAX_STEPS_PER_LINE)
    session.apply(dict(entry, n=1), force)
    rest = n - 1
    while rest > 0 and not stop():
        piece = min(rest, 1000)
        session.apply({"op": "step", "n": piece, "continues": True}, force)
        rest -= piece


def handle(args: argparse.Namespace) -> int:
    header, _ = read_numbered_journal(args.journal)
    model = args.model if args.model is not None else Path(str(header.get("model")))
    if args.save is not None:
        inputs = [("the journal being replayed", args.journal), ("the model file", model)]
        inputs += [("an input the journal recorded", Path(item["path"])) for item in header.get("inputs", [])]
        check_output(args.save, inputs, "checkpoint", "--save")
    code = check_code(args.journal, model, args.run_code)
    if code:
        print(f"stepper: note: replay runs the custom-layer code of {model}: {', '.join(map(str, code))}",
              file=sys.stderr)
    stop = StopFlag("the replay ")
    previous = signal.signal(signal.SIGINT, stop)
    try:
        with progress_bar("replaying") as bar:
            session = replay(args.journal, args.model, args.force, args.run_code, bar, lambda: stop.requested)
    finally:
        signal.signal(signal.SIGINT, previous)
    out = sys.stdout
    note = " (stopped early by Ctrl-C)" if stop.requested else ""
    out.write(f"replayed {args.journal}{note}: step {session.step_count}, rate {session.rate:g}, {session.rule}, "
              f"train cost {session.train_cost():.10g}\n")
    if args.save is not None:
        out.write(f"saved {session.save_checkpoint(args.save)}\n")
    return 0
