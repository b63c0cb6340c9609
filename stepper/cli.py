"""Command line: ``stepper open | check | run | ...``.

Each subcommand's options are in :mod:`stepper.commands.parsers` and its work in
``stepper/commands/NAME.py`` (``handle(args) -> int``), imported only once its
arguments have parsed: ``stepper --help`` and a mistyped option import neither
numpy nor Textual. This module wires them up and is the boundary where
user-facing errors become one line on stderr. Exit codes: 0 ok, 1 check failed (or a step was refused, or a runaway
cost stopped a run), 2 bad input.

One vocabulary holds in every subcommand (see ``commands/options.py``):
``--resume CK`` starts from a checkpoint, ``--samples N`` limits the rows,
``--delta H`` is the finite-difference step. Options are never abbreviated
(``--sample`` is not ``--samples``); an unknown command or option is answered
with the nearest known ones. ``stepper MODEL ...`` is ``stepper open MODEL ...``.
"""

from __future__ import annotations

import os

# One BLAS thread: Stepper's matrices are small, and a second OpenBLAS thread
# spinning against the app's own thread made a step's redraw 2-3x slower on a
# 2-core machine (tests/benchmarks/bench_ui.py). Set before numpy is imported;
# a value the user set wins.
os.environ.setdefault("OPENBLAS_NUM_THREADS", "1")

import argparse  # noqa: E402
import re
import sys
from typing import Any, Iterable, NoReturn, Sequence

from stepper import __version__
from stepper.commands.parsers import PARSERS
from stepper.errors import StepperError, UsageError

#: Subcommand modules, in the order ``--help`` lists them.
COMMANDS = ("open", "check", "run", "replay", "slice", "explain", "export", "samples", "rates", "diff")

#: The subcommand that runs when the first argument is a model or an option of its own.
DEFAULT_COMMAND = "open"

_TOP_OPTIONS = ("-h", "--help", "--version")


#: Options renamed when the vocabulary was made one (old name -> new name), so
#: that a script written for the old name is told the new one.
RENAMED = {"--step": "--delta", "--checkpoint": "--resume", "--sample": "--sample-index"}


def closest(word: str, known: Iterable[str], cutoff: float = 0.6) -> list[str]:
    """The known words closest to ``word``, closest first (at most three).

    A word counts as close at a similarity of ``cutoff`` or more (difflib's
    ratio, leading dashes left out); only those within 0.1 of the closest are kept.
    """
    # Options are compared without their dashes, which every one of them shares.
    import difflib  # only for a mistake: not on the way of a command that parses

    scored = sorted(((difflib.SequenceMatcher(None, word.lstrip("-"), k.lstrip("-")).ratio(), k)
                     for k in set(known)),
                    key=lambda rk: (-rk[0], rk[1]))
    scored = [(r, k) for r, k in scored if r >= cutoff]
    return [k for r, k in scored if r >= scored[0][0] - 0.1][:3] if scored else []


def either(words: Sequence[str]) -> str:
    """``X``, ``X or Y``, ``X, Y or Z``."""
    if len(words) < 2:
        return "".join(words)
    return f"{', '.join(words[:-1])} or {words[-1]}"


def did_you_mean(word: str, known: Iterable[str]) -> str:
    """`` (did you mean X?)`` with the nearest known words, or ``""`` when none is close."""
    close = closest(word, known)
    return f" (did you mean {either(close)}?)" if close else ""


def option_hint(word: str, known: Iterable[str]) -> str:
    """`` (did you mean X?)`` for an unknown option: its new name if it was renamed, else the nearest.

    Beside a new name, only options that differ by a letter or two are named.
    """
    known = list(known)
    renamed = RENAMED.get(word)
    if renamed not in known:
        return did_you_mean(word, known)
    others = closest(word, [k for k in known if k != renamed], cutoff=0.85)
    return f" (did you mean {either([renamed, *others])}?)"


_CHOICE = re.compile(r"invalid choice: '(?P<word>[^']*)' \(choose from (?P<known>.*)\)$")


class _Parser(argparse.ArgumentParser):
    """argparse that never abbreviates and reports a usage problem as one line, exit code 2."""

    def __init__(self, *args: Any, **kwargs: Any) -> None:
        # "--sample 1%" must never be taken for "--samples".
        kwargs["allow_abbrev"] = False
        super().__init__(*args, **kwargs)

    @property
    def where(self) -> str:
        """The subcommand's name, or "" for the top-level parser."""
        return self.prog.removeprefix("stepper").strip()

    def fail(self, message: str) -> NoReturn:
        # The boundary prints "stepper: " itself; keep only the subcommand's name.
        raise UsageError(f"{self.where}: {message}" if self.where else message)

    def error(self, message: str) -> NoReturn:
        match = _CHOICE.search(message)
        if match:
            close = closest(match["word"], (k.strip().strip("'") for k in match["known"].split(",")))
            if close:
                message = f"{message[:-1]}; did you mean {either(close)}?)"
        self.fail(message)

    def option_names(self) -> list[str]:
        return [name for action in self._actions for name in action.option_strings]

    def unrecognized(self, extras: list[str]) -> NoReturn:
        """One line for arguments nobody took: the first unknown option and the nearest known ones."""
        options = [e for e in extras if e.startswith("-") and e != "-"]
        if options:
            word = options[0].split("=", 1)[0]
            self.fail(f"unknown option {word}{option_hint(word, self.option_names())}")
        self.fail(f"unexpected argument {extras[0]!r}")


class _TopParser(_Parser):
    """The ``stepper`` parser: routes unknown arguments to the subcommand that got them."""

    def parse_args(self, args: Sequence[str] | None = None,  # type: ignore[override]
                   namespace: argparse.Namespace | None = None) -> argparse.Namespace:
        parsed, extras = self.parse_known_args(args, namespace)
        if extras:
            sub = self.subparsers.get(getattr(parsed, "command", None) or "")
            (sub or self).unrecognized(extras)
        return parsed

    @property
    def subparsers(self) -> dict[str, _Parser]:
        for action in self._actions:
            if isinstance(action, argparse._SubParsersAction):
                return dict(action.choices)
        return {}


class _Outline:
    """Stands in for a subcommand's parser whose options are not needed: takes every call, keeps nothing."""

    def __getattr__(self, name: str) -> Any:
        return self._ignore

    def _ignore(self, *args: Any, **kwargs: Any) -> "_Outline":
        return self


class _Outlines:
    """Subparsers that get their name, help and description but none of their options."""

    def __init__(self, subs: Any) -> None:
        self.subs = subs

    def add_parser(self, name: str, **kwargs: Any) -> _Outline:
        self.subs.add_parser(name, **kwargs)
        return _Outline()


def build_parser(full: Iterable[str] | None = None) -> argparse.ArgumentParser:
    """The ``stepper`` parser; only the subcommands in ``full`` (all when None) get their options.

    ``stepper --help`` needs no subcommand's options (only names and help): building
    all ten took about a fifth of its time.
    """
    parser = _TopParser(
        prog="stepper",
        description="See every weight's slope, check it against finite differences, "
        "and step gradient descent by hand. 'stepper MODEL' opens MODEL in the app.",
    )
    parser.add_argument("--version", action="version", version=f"stepper {__version__}")
    subs = parser.add_subparsers(dest="command", metavar="COMMAND", parser_class=_Parser)
    wanted = set(COMMANDS if full is None else full)
    for name in COMMANDS:
        PARSERS[name](subs if name in wanted else _Outlines(subs))
    return parser


def needed(argv: Sequence[str]) -> set[str]:
    """The subcommands whose options parsing ``argv`` can use (see :func:`route`)."""
    if argv and argv[0] in COMMANDS:
        return {argv[0]}
    if argv and argv[0] in _TOP_OPTIONS:
        return set()
    return {DEFAULT_COMMAND}


def route(parser: argparse.ArgumentParser, argv: list[str]) -> list[str]:
    """``argv`` with the default subcommand put in front where the user left it out.

    ``stepper`` alone, ``stepper MODEL ...`` and ``stepper --rate 2 ...`` mean
    ``stepper open ...``. A first word that is neither a command nor a model is
    refused with the nearest commands and bundled scenarios.
    """
    if not argv:
        return [DEFAULT_COMMAND]
    first = argv[0]
    if first in COMMANDS or first in _TOP_OPTIONS:
        return argv
    if first == "--":  # the end of options: what follows is open's model
        return [DEFAULT_COMMAND, *argv]
    if first.startswith("-") and first != "-":
        word = first.split("=", 1)[0]
        opened = parser.subparsers[DEFAULT_COMMAND] if isinstance(parser, _TopParser) else None
        if opened is not None and word not in opened.option_names():
            raise UsageError(f"unknown option {word}{option_hint(word, [*_TOP_OPTIONS, *opened.option_names()])}")
        return [DEFAULT_COMMAND, *argv]
    if _looks_like_model(first):
        return [DEFAULT_COMMAND, *argv]
    from stepper.scenarios import scenario_names

    scenarios = scenario_names()
    hint = closest(first, [*COMMANDS, *scenarios])
    if hint:
        raise UsageError(f"{first!r} is neither a command nor a model: did you mean {either(hint)}?")
    raise UsageError(f"{first!r} is neither a command ({', '.join(COMMANDS)}) nor a model file, a scenario "
                     f"folder or a bundled scenario ({', '.join(scenarios)})")


def _looks_like_model(word: str) -> bool:
    """A path that exists, a name meant as a path, or a bundled scenario's name."""
    from stepper.scenarios import scenario_names

    if "/" in word or os.sep in word or word.endswith(".toml") or word in scenario_names():
        return True
    try:
        from pathlib import Path

        return Path(word).exists()
    except (OSError, ValueError):
        return False


def main(argv: Sequence[str] | None = None) -> int:
    """Run the command line; returns the exit code."""
    args_list = list(sys.argv[1:] if argv is None else argv)
    try:
        parser = build_parser(needed(args_list))
        args = parser.parse_args(route(parser, args_list))
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
