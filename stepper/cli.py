"""Command line: ``stepper open | check | run | ...``.

Each subcommand lives in its own module under :mod:`stepper.commands` and
exposes ``add_parser(subparsers)`` and ``run(args) -> int``. This module wires
them up and is the boundary where user-facing errors become one line on
stderr. Exit codes: 0 ok, 1 check failed (or a step was refused), 2 bad input.
"""

from __future__ import annotations

import os

# One BLAS thread: Stepper's matrices are small, and a second OpenBLAS thread
# spinning against the app's own thread made a step's redraw 2-3x slower on a
# 2-core machine (tests/benchmarks/bench_ui.py). Set before numpy is imported;
# a value the user set wins.
os.environ.setdefault("OPENBLAS_NUM_THREADS", "1")

import argparse  # noqa: E402
import sys
from importlib import import_module
from typing import Sequence

from stepper import __version__
from stepper.errors import StepperError

#: Subcommand modules, in the order ``--help`` lists them.
COMMANDS = ("open", "check", "run", "replay", "slice", "explain")


class _Parser(argparse.ArgumentParser):
    """argparse that reports a usage problem as one line and exit code 2."""

    def error(self, message: str) -> None:  # type: ignore[override]
        # The boundary prints "stepper: " itself; keep only the subcommand's name.
        where = self.prog.removeprefix("stepper").strip()
        raise StepperError(f"{where}: {message}" if where else message)


def build_parser() -> argparse.ArgumentParser:
    parser = _Parser(
        prog="stepper",
        description="See every weight's slope, check it against finite differences, "
        "and step gradient descent by hand.",
    )
    parser.add_argument("--version", action="version", version=f"stepper {__version__}")
    subs = parser.add_subparsers(dest="command", metavar="COMMAND", parser_class=_Parser)
    for name in COMMANDS:
        try:
            module = import_module(f"stepper.commands.{name}")
        except ModuleNotFoundError as exc:
            if exc.name == f"stepper.commands.{name}":
                continue
            raise
        module.add_parser(subs)
    return parser


def _use_cores() -> None:
    """Numeric slopes on up to two threads, when BLAS runs one thread (as set above)."""
    if os.environ.get("OPENBLAS_NUM_THREADS") == "1":
        from stepper.core.numeric import set_workers

        set_workers(min(2, os.cpu_count() or 1))


def main(argv: Sequence[str] | None = None) -> int:
    """Run the command line; returns the exit code."""
    args_list = list(sys.argv[1:] if argv is None else argv)
    _use_cores()
    try:
        parser = build_parser()
        if not args_list:
            args_list = ["open"]
        args = parser.parse_args(args_list)
        if args.command is None:
            parser.print_help()
            return 2
        code: int = args.handler(args)
        return code
    except StepperError as exc:
        print(f"stepper: {exc.message}", file=sys.stderr)
        return exc.exit_code
    except KeyboardInterrupt:
        print("stepper: interrupted", file=sys.stderr)
        return 130
    except BrokenPipeError:
        return 0
