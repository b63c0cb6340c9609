"""``stepper replay``: rebuild a session's state from its journal."""

from __future__ import annotations

import argparse
import sys
from pathlib import Path
from typing import Any

from stepper.errors import CheckpointError, StepperError
from stepper.formats.journal import read_numbered_journal
from stepper.formats.model_file import load_setup
from stepper.session import Session


def add_parser(subs: Any) -> None:
    p = subs.add_parser(
        "replay",
        help="rebuild a session from its journal (after a crash) and save it as a checkpoint",
        description="Re-run every operation recorded in a journal, starting from the model "
        "file the journal names, and report (and optionally save) the resulting state.",
    )
    p.add_argument("journal", type=Path, help="journal file (.jsonl)")
    p.add_argument("--model", type=Path, default=None,
                   help="model file to start from (default: the one the journal names)")
    p.add_argument("--save", type=Path, default=None, metavar="PATH", help="write the rebuilt state as a checkpoint")
    p.add_argument("--force", action="store_true",
                   help="replay even if the model file or a loaded checkpoint has changed")
    p.set_defaults(handler=handle)


def replay(journal: Path, model: Path | None = None, force: bool = False) -> Session:
    """A session rebuilt from ``journal``; the journal itself is not written to."""
    header, entries = read_numbered_journal(journal)
    document = (header.get("start") or {}).get("document") if isinstance(header.get("start"), dict) else None
    if model is None and isinstance(document, dict):
        # An ONNX file that was opened with --data, --targets and --loss: the options built this document.
        from stepper.commands.graph_data import graph_setup

        setup = graph_setup(document, Path(str(header.get("model"))))
    else:
        setup = load_setup(model if model is not None else Path(str(header.get("model"))))
    if setup.digest != header.get("digest") and not force:
        raise CheckpointError(
            f"{journal}: the model file {setup.path} has changed since the journal was written "
            "(use --force to replay anyway)"
        )
    start = header.get("start") or {}
    try:
        batch = start.get("batch_size")
        session = Session(setup, rate=float(start.get("rate", 0.1)), rule=str(start.get("rule", "gd")),
                          seed=int(start.get("seed", 0)),
                          slope_source=str(start.get("slope_source", "analytic")),
                          batch_size=None if batch is None else int(batch))
    except (AttributeError, TypeError, ValueError, StepperError) as exc:
        raise CheckpointError(f"{journal}: line 1: the starting settings are not valid ({exc})") from None
    for number, entry in entries:
        try:
            session.apply(entry, force)
        except StepperError as exc:
            # Same error (and exit code), told where in the journal it happened.
            exc.message = f"{journal}: line {number}: {exc.message}"
            raise
    return session


def handle(args: argparse.Namespace) -> int:
    session = replay(args.journal, args.model, args.force)
    out = sys.stdout
    out.write(f"replayed {args.journal}: step {session.step_count}, rate {session.rate:g}, {session.rule}, "
              f"train cost {session.train_cost():.10g}\n")
    if args.save is not None:
        out.write(f"saved {session.save_checkpoint(args.save)}\n")
    return 0
