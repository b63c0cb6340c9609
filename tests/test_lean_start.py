"""A lean start: ``stepper --help`` and argument errors import neither numpy (so no numeric core) nor Textual.

Each case runs in a fresh interpreter (a subprocess), as a user's command
would, and reports which modules it loaded (``sys.modules``), so that what the
test process itself has imported cannot hide anything. Every module of the
numeric core imports numpy, so no numpy means no numeric core; the session,
the file formats and the app are not loaded either.

The parsers spell again the choices the core, the session and the formats
offer (stepper/commands/options.py); the last test compares each with its source.
"""

from __future__ import annotations

import json
import subprocess
import sys

import pytest

CHILD = """
import json, sys
from stepper.cli import main
try:
    code = main(sys.argv[1:])
except SystemExit as exc:
    code = exc.code
heavy = sorted(m for m in sys.modules if m.split(".")[0] in ("numpy", "textual", "plotext", "safetensors")
               or m.startswith(("stepper.session", "stepper.ui", "stepper.formats")))
print(json.dumps({"code": code, "heavy": heavy}), file=sys.__stdout__)
"""


def loaded(*argv: str) -> tuple[int, list[str]]:
    """Exit code and heavy modules loaded by ``stepper ARGV`` in a fresh interpreter."""
    done = subprocess.run([sys.executable, "-c", CHILD, *argv], capture_output=True, text=True, timeout=60)
    report = json.loads(done.stdout.strip().splitlines()[-1])
    return int(report["code"] or 0), list(report["heavy"])


COMMANDS = ["open", "check", "run", "replay", "slice", "explain", "export", "samples", "rates", "diff"]


@pytest.mark.parametrize("argv", [
    ["--help"],
    ["--version"],
    *[[command, "--help"] for command in COMMANDS],
])
def test_help_imports_no_numeric_core(argv: list[str]) -> None:
    code, heavy = loaded(*argv)
    assert code == 0 and heavy == []


@pytest.mark.parametrize("argv", [
    ["chek"],                                     # an unknown command
    ["--no-such-option"],                         # an unknown option of the default command
    ["check", "--sample", "1%"],                  # an abbreviation, refused
    ["check", "--delta", "abc"],                  # a value of the wrong type
    ["check", "--method", "sideways"],            # not one of the choices
    ["run", "--rule", "adagrad"],
    ["run", "--schedule", "sometimes"],
    ["slice"],                                    # a required argument missing
    ["slice", "L1.W[0,0]", "--size", "10"],
    ["samples", "--threshold", "2"],
    ["open", "--numeric-budget", "-1"],
])
def test_argument_errors_import_no_numeric_core(argv: list[str]) -> None:
    code, heavy = loaded(*argv)
    assert code == 2 and heavy == []


def test_the_child_would_see_a_heavy_import() -> None:
    # The probe itself: a command that runs loads numpy and the core.
    code, heavy = loaded("check", "kiln-tiny", "--weights", "1")
    assert code == 0 and "numpy" in heavy and "stepper.session" in heavy and "stepper.formats.model_file" in heavy


def test_choices_spelled_for_the_parsers_are_the_sources() -> None:
    from stepper.commands import options
    from stepper.core.input_slopes import DEFAULT_SAMPLES
    from stepper.core.losses import LOSSES
    from stepper.core.metrics import THRESHOLD
    from stepper.core.numeric import METHODS
    from stepper.core.optimizers import RULES
    from stepper.core.ratetest import DEFAULT_STEPS
    from stepper.core.slice import DEFAULT_POINTS
    from stepper.formats.weight_sources import DTYPES
    from stepper.formats.weights_export import LAYOUTS
    from stepper.session import SLOPE_SOURCES
    from stepper.session.measures import SPLITS
    from stepper.session.runaway import GROWTH, RISES

    assert options.METHODS == METHODS and options.RULES == RULES and options.SLOPE_SOURCES == SLOPE_SOURCES
    assert options.LOSS_NAMES == tuple(LOSSES)
    assert (options.GROWTH, options.RISES) == (GROWTH, RISES)
    assert options.INPUT_SAMPLES == DEFAULT_SAMPLES and options.SLICE_POINTS == DEFAULT_POINTS
    assert options.RATE_TEST_STEPS == DEFAULT_STEPS and options.THRESHOLD == THRESHOLD
    assert options.SPLITS == SPLITS and options.LAYOUTS == LAYOUTS and options.DTYPES == DTYPES


@pytest.mark.parametrize("argv", [["--help"], ["check", "--help"], ["--rate", "2"], [], ["run", "x.toml"]])
def test_building_only_the_needed_subcommands_changes_no_help(argv: list[str]) -> None:
    # `stepper --help` builds no subcommand's options; the help it prints must be the full parser's,
    # and a subcommand that parses must have all of its options.
    from stepper import cli

    lean, full = cli.build_parser(cli.needed(argv)), cli.build_parser()
    assert lean.format_help() == full.format_help()
    for name in cli.needed(argv):
        assert lean.subparsers[name].format_help() == full.subparsers[name].format_help()
        assert lean.subparsers[name].option_names() == full.subparsers[name].option_names()
    assert cli.needed(argv) <= {argv[0] if argv and argv[0] in cli.COMMANDS else cli.DEFAULT_COMMAND}
