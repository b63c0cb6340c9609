"""``stepper open`` on the command line: the parser, and refusals before the app starts."""

from __future__ import annotations

import logging
import sys
import warnings
from pathlib import Path

import pytest

from stepper.cli import build_parser, main
from stepper.commands.open import cut_samples
from stepper.commands.parsers import default_log_file
from stepper.errors import UsageError
from stepper.formats.model_file import load_setup
from stepper.scenarios import default_model
from stepper.ui.app import log_to_file


def test_open_is_registered_with_its_options() -> None:
    args = build_parser().parse_args(["open", "--rate", "0.05", "--rule", "adam", "--noise", "0.1",
                                      "--check-every-step"])
    assert args.command == "open"
    assert args.model is None
    assert (args.rate, args.rule, args.noise, args.check_every_step) == (0.05, "adam", 0.1, True)


def test_open_without_a_terminal_is_one_line_and_exit_2(capsys: pytest.CaptureFixture[str]) -> None:
    # Under pytest stdin is not a terminal.
    assert not sys.stdin.isatty()
    assert main(["open"]) == 2
    err = capsys.readouterr().err
    assert err.count("\n") == 1
    assert err.startswith("stepper: open needs a terminal")


def test_samples_cut_the_training_set_only() -> None:
    setup = load_setup(default_model())
    cut = cut_samples(setup, 5)
    assert cut.data.X.shape == (5, setup.data.X.shape[1])
    assert cut.data.Y.shape[0] == 5
    assert cut.data.X_val.shape == setup.data.X_val.shape


def test_log_file_follows_xdg_state_home(monkeypatch: pytest.MonkeyPatch, tmp_path: Path) -> None:
    monkeypatch.setenv("XDG_STATE_HOME", str(tmp_path))
    assert default_log_file() == tmp_path / "stepper" / "open.log"


def test_while_the_app_runs_logs_and_warnings_go_to_the_log_file(
    tmp_path: Path, capsys: pytest.CaptureFixture[str]
) -> None:
    log_file = tmp_path / "state" / "open.log"
    with warnings.catch_warnings():
        warnings.simplefilter("always")
        with log_to_file(log_file):
            logging.getLogger("stepper.session").warning("a record for the file")
            warnings.warn("a warning for the file", RuntimeWarning)
    out, err = capsys.readouterr()
    assert (out, err) == ("", "")
    text = log_file.read_text(encoding="utf-8")
    assert "a record for the file" in text and "a warning for the file" in text


def test_an_unwritable_log_file_is_a_usage_error(tmp_path: Path) -> None:
    blocker = tmp_path / "file"
    blocker.write_text("not a folder", encoding="utf-8")
    with pytest.raises(UsageError, match="cannot write the log file"):
        with log_to_file(blocker / "open.log"):
            pass
