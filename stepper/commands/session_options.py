"""A session set up as the command line asks: step options, frozen weights, checkpoint, training settings.

Shared by ``open``, ``run`` and ``rates`` (their options are in
:mod:`stepper.commands.options`); with :func:`open_session` a command gets a
session with the checkpoint loaded and every step and training option
applied, in that order.
"""

from __future__ import annotations

import argparse
from pathlib import Path
from typing import Any

from stepper.commands.common import apply_step_options, load
from stepper.formats.outputs import check_output
from stepper.session import Session, verify_checkpoint






def open_session(args: argparse.Namespace, journal: Any = None, save: Path | None = None) -> Session:
    """A session on the model, the checkpoint loaded, then the options applied in that order.

    Before anything is written: the journal and the checkpoint to ``save`` pass
    the output guard (never an input, never a special file), and the checkpoint
    to resume is read and checked, so a bad one leaves no journal behind.
    """
    setup = load(args)
    inputs = setup.input_files() + ([("the checkpoint to resume", args.resume)] if args.resume else [])
    if journal is not None:
        check_output(journal, inputs, "journal", "--journal")
        inputs.append(("the journal", journal))
    if save is not None:
        check_output(save, inputs, "checkpoint", "--save")
    if args.resume is not None:
        verify_checkpoint(setup, args.resume)
    session = Session(setup, journal=journal, seed=args.seed)
    try:
        if args.resume is not None:
            session.load_checkpoint(args.resume)
        apply_step_options(session, args)
        for pattern in args.freeze:
            session.freeze_matching(pattern)
        apply_training_options(session, args)
    except BaseException:
        session.close()
        raise
    return session


def apply_training_options(session: Session, args: argparse.Namespace) -> None:
    """The training options where they differ from the session's (each undoable and journaled)."""
    if args.l2 is not None and args.l2 != session.l2:
        session.set_l2(args.l2)
    if args.weight_decay is not None and args.weight_decay != session.weight_decay:
        session.set_weight_decay(args.weight_decay)
    if args.clip_norm is not None:
        norm = None if args.clip_norm == "off" else args.clip_norm
        if norm != session.clip_norm:
            session.set_clip_norm(norm)
    if args.schedule is not None and args.schedule != session.schedule:
        session.set_schedule(args.schedule)


def settings_document(session: Session) -> dict[str, Any]:
    """The training settings as JSON."""
    return {"l2": session.l2, "weight_decay": session.weight_decay, "clip_norm": session.clip_norm,
            "schedule": session.schedule.as_dict()}





