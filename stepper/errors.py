"""User-facing errors.

Every problem that a user can cause and fix (a bad file, a bad option, a step
that would blow up) is raised as a subclass of :class:`StepperError`. The CLI
catches that base class at its boundary, prints the message as one line on
stderr and exits with the error's ``exit_code``; the app shows it as a notice.
Any other exception is a bug and keeps its traceback.

    StepperError                 exit 2: the input cannot be used
    ├── ModelFileError           a model file (TOML) is wrong
    ├── DataFileError            a dataset (CSV) is wrong
    ├── CheckpointError          a checkpoint, weights file or journal is wrong
    ├── CustomLayerError         a user's layer code raised or returned bad shapes
    ├── UsageError               a command-line value or typed value is wrong
    └── DivergenceError          exit 1: a step was refused as non-finite
        └── RunawayError         exit 1: a run of steps stopped because the cost ran away
"""

from __future__ import annotations


class StepperError(Exception):
    """Base of every error a user can cause; its message is one whole sentence."""

    exit_code: int = 2

    def __init__(self, message: str) -> None:
        super().__init__(message)
        self.message = message

    def __str__(self) -> str:
        return self.message


class ModelFileError(StepperError):
    """A model file is missing, malformed or inconsistent."""


class DataFileError(StepperError):
    """A dataset file is missing, malformed or does not fit the model."""


class CheckpointError(StepperError):
    """A checkpoint, weights file or journal cannot be read or does not fit."""


class CustomLayerError(StepperError):
    """A user's custom layer failed; the message carries the user's traceback lines."""


class UsageError(StepperError):
    """A value given on the command line or typed in the app is not usable."""


class DivergenceError(StepperError):
    """A step was refused because the cost or a weight would become non-finite.

    ``what`` is the message's first part, what happened, without the advice that
    follows it, for a caller that gives advice of its own (the command line).
    """

    exit_code = 1

    def __init__(self, message: str, names: tuple[str, ...] = (), what: str = "") -> None:
        super().__init__(message)
        self.names = names
        self.what = what or message


class RunawayError(DivergenceError):
    """A run of steps stopped, its steps kept, because the cost grew past the session's runaway rule."""
