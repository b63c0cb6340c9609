"""``stepper open``: the interactive app over one model (the default command)."""

from __future__ import annotations

import argparse
import dataclasses
import sys

from stepper.commands.common import apply_step_options, load, runaway_rule, sample_limit
from stepper.commands.parsers import default_log_file
from stepper.commands.session_options import apply_training_options
from stepper.errors import UsageError
from stepper.formats.model_file import Setup
from stepper.formats.outputs import check_output








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
