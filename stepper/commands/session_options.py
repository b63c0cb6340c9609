"""The training settings on the command line (``--l2``, ``--weight-decay``, ``--clip-norm``, ``--schedule``).

Shared by ``open``, ``run`` and ``rates``; with :func:`open_session` a command
gets a session with the checkpoint loaded and every step and training option
applied, in that order.
"""

from __future__ import annotations

import argparse
import math
from pathlib import Path
from typing import Any

from stepper.commands.common import add_resume_option, add_step_options, apply_step_options, load, positive_float
from stepper.core.schedules import Schedule, ScheduleError, parse_schedule
from stepper.formats.outputs import check_output
from stepper.session import Session, verify_checkpoint


def add_training_options(p: argparse.ArgumentParser) -> None:
    """``--l2``, ``--weight-decay``, ``--clip-norm`` and ``--schedule`` (default: the model file's or checkpoint's)."""
    p.add_argument("--l2", type=_not_negative, default=None, metavar="L",
                   help="L2 term (L/2) x sum of squared weights in the cost; 0 for none "
                   "(default: the model file's [training].l2, or the checkpoint's)")
    p.add_argument("--weight-decay", type=_not_negative, default=None, metavar="D",
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


def _not_negative(text: str) -> float:
    try:
        value = float(text)
    except ValueError:
        raise argparse.ArgumentTypeError(f"{text!r} is not a number") from None
    if not math.isfinite(value) or value < 0:
        raise argparse.ArgumentTypeError(f"{text!r} must be a number, 0 or more")
    return value


def _clip(text: str) -> float | str:
    if text.strip().lower() in ("off", "none"):
        return "off"
    return positive_float(text)


def _schedule(text: str) -> Schedule:
    try:
        return parse_schedule(text)
    except ScheduleError as exc:
        raise argparse.ArgumentTypeError(f"{text!r}: {exc}") from None
