"""``stepper open``: the interactive app over one model (the default command)."""

from __future__ import annotations

import argparse
import dataclasses
import math
import sys
from pathlib import Path
from typing import Any

from stepper.commands.common import (
    add_model_argument,
    add_resume_option,
    add_samples_option,
    add_step_options,
    apply_step_options,
    load,
    positive_float,
    runaway_rule,
    sample_limit,
)
from stepper.commands.session_options import add_training_options, apply_training_options
from stepper.errors import UsageError
from stepper.formats.model_file import Setup
from stepper.formats.outputs import check_output


def default_log_file() -> Path:
    """Where the app logs while it runs: the user's state folder (platformdirs), ``stepper/open.log``.

    On Linux that is ``$XDG_STATE_HOME/stepper/open.log`` (``~/.local/state`` by default).
    """
    import platformdirs

    return Path(platformdirs.user_state_path("stepper")) / "open.log"


def add_parser(subs: Any) -> None:
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
    p.add_argument("--journal", type=Path, default=None, metavar="PATH",
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
    p.add_argument("--log", type=Path, default=None, metavar="PATH",
                   help=f"log file while the app runs (default {default_log_file()})")
    p.set_defaults(handler=handle)


def _budget(text: str) -> float:
    """A budget in milliseconds: a finite number, 0 or more."""
    try:
        value = float(text)
    except ValueError:
        raise argparse.ArgumentTypeError(f"{text!r} is not a number of milliseconds") from None
    if not (math.isfinite(value) and value >= 0):
        raise argparse.ArgumentTypeError(f"{text!r} must be 0 or more milliseconds")
    return value


def cut_samples(setup: Setup, n: int) -> Setup:
    """``setup`` training on its first ``n`` training samples only."""
    X, Y = sample_limit(setup, n)
    return dataclasses.replace(setup, data=dataclasses.replace(setup.data, X=X, Y=Y))


def handle(args: argparse.Namespace) -> int:
    if not (sys.stdin.isatty() and sys.stderr.isatty()):
        raise UsageError("open needs a terminal on stdin and stderr; "
                         "from a script use 'stepper run' or 'stepper check'")
    if args.samples is not None and args.journal is not None:
        raise UsageError("--samples cannot be combined with --journal: "
                         "stepper replay would rebuild the session with every sample")
    setup = load(args)
    if args.samples is not None:
        setup = cut_samples(setup, args.samples)
    # Imported here so that the other commands start without loading Textual.
    from stepper.session import Session, default_journal_for, verify_checkpoint
    from stepper.ui.app import run_app

    if args.resume is not None:
        verify_checkpoint(setup, args.resume)  # before the journal is created: a bad one leaves no file
    new_journal = False
    if args.no_journal or args.samples is not None:
        # A journal of a cut training set could not be replayed from the model file.
        args.journal = None
    elif args.journal is None:
        args.journal = default_journal_for(setup.path)
        new_journal = True
    else:
        check_output(args.journal, setup.input_files(), "journal", "--journal")
    log_file = args.log or default_log_file()
    check_output(log_file, setup.input_files() + ([("the journal", args.journal)] if args.journal else []),
                 "text", "--log")

    batch = None if args.batch is None else min(args.batch, setup.data.n_train)
    if args.resume is None:
        # Starting settings go to the constructor (and the journal's header), so
        # a fresh session with --rate, --rule, --slopes or --batch has no unsaved changes yet.
        session = Session(setup, journal=args.journal, rate=args.rate if args.rate is not None else 0.1,
                          rule=args.rule or "gd", seed=args.seed, slope_source=args.slopes or "analytic",
                          batch_size=batch, new_journal=new_journal)
    else:
        session = Session(setup, journal=args.journal, seed=args.seed, new_journal=new_journal)
    try:
        if args.resume is not None:
            session.load_checkpoint(args.resume)
            apply_step_options(session, args)
        apply_training_options(session, args)  # undoable changes, journaled: replay makes them too
        session.set_runaway(runaway_rule(args))
        session.set_refresh_after_step(bool(args.check_every_step))
        return run_app(session, log_file, noise=args.noise, numeric_budget=args.numeric_budget / 1000.0)
    finally:
        session.close()
