"""One command-line vocabulary in every subcommand (our own contract, README "The command line").

``--resume CK`` starts from a checkpoint, ``--samples N`` limits the rows,
``--delta H`` is the finite-difference step; options are never abbreviated; an
unknown command or option is answered with the nearest known ones; ``stepper
MODEL`` opens MODEL. Each test calls ``stepper.cli.main`` and checks the exit
code and the exact one-line message.
"""

from __future__ import annotations

import argparse
import json
from pathlib import Path

import numpy as np
import pytest

from stepper import cli
from stepper.commands.replay import replay
from stepper.errors import UsageError
from stepper.formats.model_file import load_setup
from stepper.session import Session

SCENARIOS = Path(__file__).resolve().parents[1] / "scenarios"
KILN = SCENARIOS / "kiln-tiny" / "model.toml"
BAKERY = SCENARIOS / "bakery-demand" / "model.toml"


def said(capsys: pytest.CaptureFixture[str], *argv: str) -> tuple[int, str]:
    """Exit code and the whole of stderr."""
    code = cli.main(list(argv))
    return code, capsys.readouterr().err


def subparsers() -> dict[str, argparse.ArgumentParser]:
    parser = cli.build_parser()
    assert isinstance(parser, cli._TopParser)
    return dict(parser.subparsers)


# -- old names and abbreviations ------------------------------------------------------------------


@pytest.mark.parametrize("argv, message", [
    (["check", str(KILN), "--step", "1e-6"], "check: unknown option --step (did you mean --delta?)"),
    (["check", str(KILN), "--step=1e-6"], "check: unknown option --step (did you mean --delta?)"),
    (["slice", str(KILN), "L1.W[0,0]", "--checkpoint", "k.safetensors"],
     "slice: unknown option --checkpoint (did you mean --resume?)"),
    (["explain", str(KILN), "L1.W[0,0]", "--checkpoint", "k.safetensors"],
     "explain: unknown option --checkpoint (did you mean --resume?)"),
    (["explain", str(KILN), "L1.W[0,0]", "--sample", "3"],
     "explain: unknown option --sample (did you mean --sample-index or --samples?)"),
])
def test_old_option_names_are_refused_with_the_new_one(capsys: pytest.CaptureFixture[str], argv: list[str],
                                                       message: str) -> None:
    assert said(capsys, *argv) == (2, f"stepper: {message}\n")


@pytest.mark.parametrize("argv, message", [
    # "--sample 1%" must not be read as "--samples" (argparse would, by default).
    (["check", str(KILN), "--sample", "1%"], "check: unknown option --sample (did you mean --samples?)"),
    (["check", "--sample", "1%", str(KILN)], "check: unknown option --sample (did you mean --samples?)"),
    (["run", str(KILN), "--rat", "2"], "run: unknown option --rat (did you mean --rate?)"),
    (["run", str(KILN), "--step", "3"], "run: unknown option --step (did you mean --steps?)"),
    (["run", str(KILN), "--resum", "k.safetensors"], "run: unknown option --resum (did you mean --resume?)"),
    (["slice", str(KILN), "L1.W[0,0]", "--poin", "9"], "slice: unknown option --poin (did you mean --points?)"),
    (["check", str(KILN), "--frobnicate"], "check: unknown option --frobnicate"),
    (["check", str(KILN), "extra"], "check: unexpected argument 'extra'"),
    (["run", str(KILN), "--rule", "adm"],
     "run: argument --rule: invalid choice: 'adm' (choose from 'gd', 'momentum', 'adam'; did you mean adam?)"),
])
def test_abbreviations_and_unknown_options(capsys: pytest.CaptureFixture[str], argv: list[str],
                                           message: str) -> None:
    assert said(capsys, *argv) == (2, f"stepper: {message}\n")


def test_no_parser_abbreviates() -> None:
    parsers = subparsers()
    assert set(parsers) == set(cli.COMMANDS)
    assert not cli.build_parser().allow_abbrev
    assert all(not p.allow_abbrev for p in parsers.values())


# -- commands and the default command -------------------------------------------------------------


@pytest.mark.parametrize("word, message", [
    ("chekc", "'chekc' is neither a command nor a model: did you mean check?"),
    ("explian", "'explian' is neither a command nor a model: did you mean explain?"),
    ("kiln-tny", "'kiln-tny' is neither a command nor a model: did you mean kiln-tiny?"),
    ("--verison", "unknown option --verison (did you mean --version?)"),
])
def test_unknown_commands_get_the_nearest(capsys: pytest.CaptureFixture[str], word: str, message: str) -> None:
    assert said(capsys, word) == (2, f"stepper: {message}\n")


def test_an_unknown_word_far_from_everything_lists_what_exists(capsys: pytest.CaptureFixture[str]) -> None:
    code, err = said(capsys, "zzz")
    assert code == 2 and err.count("\n") == 1
    assert err.startswith("stepper: 'zzz' is neither a command (open, check, run, replay, slice, explain, export, "
                          "samples, rates, diff) nor a "
                          "model file, a scenario folder or a bundled scenario (bakery-demand, ")


@pytest.mark.parametrize("argv", [[], ["kiln-tiny"], [str(KILN)], [str(KILN.parent)], ["missing/model.toml"],
                                  ["--rate", "2"], ["--resume=k.safetensors"], ["--", "kiln-tiny"]])
def test_a_model_or_an_option_alone_opens_the_app(capsys: pytest.CaptureFixture[str], argv: list[str]) -> None:
    # Under pytest stdin is not a terminal, so "open" answers that it needs one: that
    # line shows the words went to "open" and not to another command.
    assert said(capsys, *argv) == (2, "stepper: open needs a terminal on stdin and stderr; "
                                      "from a script use 'stepper run' or 'stepper check'\n")


def test_open_takes_the_step_options_of_run() -> None:
    args = cli.build_parser().parse_args(cli.route(cli.build_parser(), [
        "kiln-tiny", "--batch", "3", "--slopes", "numeric", "--seed", "7", "--resume", "k.safetensors",
        "--samples", "5"]))
    assert (args.command, args.model, args.batch, args.slopes, args.seed) == ("open", "kiln-tiny", 3, "numeric", 7)
    assert (args.resume, args.samples) == (Path("k.safetensors"), 5)
    run_options = {o for a in subparsers()["run"]._actions for o in a.option_strings}
    open_options = {o for a in subparsers()["open"]._actions for o in a.option_strings}
    assert {"--rate", "--rule", "--slopes", "--batch", "--seed", "--resume"} <= run_options & open_options
    runaway = {"--runaway-growth", "--runaway-rises", "--run-on"}
    assert runaway <= run_options & open_options
    # The rate range test makes every step it can: it offers no runaway options.
    rates_options = {o for a in subparsers()["rates"]._actions for o in a.option_strings}
    assert not runaway & rates_options


@pytest.mark.parametrize("command", [c for c in cli.COMMANDS if c != "replay"])
def test_every_command_over_a_model_takes_resume_and_samples_where_rows_count(command: str) -> None:
    options = {o for a in subparsers()[command]._actions for o in a.option_strings}
    assert "--resume" in options and "--checkpoint" not in options
    assert "--step" not in options and "--sample" not in options


# -- --resume does what it says ----------------------------------------------------------------


@pytest.fixture
def trained(tmp_path: Path) -> tuple[Path, Session]:
    """A checkpoint of bakery-demand after 30 steps at rate 0.05."""
    session = Session(load_setup(BAKERY), rate=0.05)
    session.step(30)
    path = session.save_checkpoint(tmp_path / "trained.safetensors")
    return path, session


def test_check_resume_checks_the_checkpoints_weights(capsys: pytest.CaptureFixture[str],
                                                     trained: tuple[Path, Session]) -> None:
    path, session = trained
    assert cli.main(["check", str(BAKERY), "--resume", str(path), "--json"]) == 0
    doc = json.loads(capsys.readouterr().out)
    np.testing.assert_array_equal([w["value"] for w in doc["weights"]], session.theta)
    np.testing.assert_allclose([w["analytic"] for w in doc["weights"]], session.analytic_slopes(), rtol=1e-12)
    assert doc["cost"] == pytest.approx(session.train_cost(), rel=1e-12)
    assert doc["checkpoint"] == str(path)
    # The health takes the checkpoint's rate when --rate is not given.
    assert doc["health"]["rate"] == 0.05
    assert cli.main(["check", str(BAKERY), "--resume", str(path), "--worst", "1"]) == 0
    assert f"weights from {path}\n" in capsys.readouterr().out


def test_slice_and_explain_resume(capsys: pytest.CaptureFixture[str], trained: tuple[Path, Session]) -> None:
    path, session = trained
    index = session.net.layout.lookup("L2.b[0]")
    assert cli.main(["slice", str(BAKERY), "L2.b[0]", "--resume", str(path), "--json"]) == 0
    doc = json.loads(capsys.readouterr().out)
    assert (doc["value"], doc["rate"]) == (session.theta[index], 0.05)
    assert doc["slope"] == pytest.approx(session.analytic_slopes()[index], rel=1e-12)
    assert cli.main(["explain", str(BAKERY), "L2.b[0]", "--resume", str(path), "--json"]) == 0
    doc = json.loads(capsys.readouterr().out)
    assert doc["value"] == session.theta[index]
    assert doc["analytic"] == pytest.approx(session.analytic_slopes()[index], rel=1e-12)


def test_starting_settings_are_in_the_journal_and_replayed(tmp_path: Path) -> None:
    journal = tmp_path / "j.jsonl"
    session = Session(load_setup(BAKERY), journal=journal, rate=0.02, seed=5, slope_source="numeric",
                      batch_size=16)
    assert not session.dirty and not session.can_undo
    session.step(3)
    session.close()
    again = replay(journal)
    assert (again.slope_source, again.batch_size, again.rate) == ("numeric", 16, 0.02)
    np.testing.assert_array_equal(again.theta, session.theta)


def test_starting_settings_are_checked() -> None:
    setup = load_setup(KILN)
    with pytest.raises(UsageError, match="batch size 99 must be between 1 and the 6 training samples"):
        Session(setup, batch_size=99)
    with pytest.raises(UsageError, match="unknown slope source 'guessed'"):
        Session(setup, slope_source="guessed")
    assert Session(setup, batch_size=6).batch_size is None
