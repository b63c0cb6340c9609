"""Where a session's checkpoints and journals go by default."""

from __future__ import annotations

import os
from pathlib import Path

from stepper.formats.journal import new_journal_path
from stepper.scenarios import scenarios_root


def session_folder_for(model: Path) -> Path:
    """Where checkpoints and journals of sessions over ``model`` go by default.

    ``<model stem>.checkpoints`` beside the model file; for a bundled scenario
    (wherever Stepper is installed: inside the package, or the source tree of
    an editable install), or a model in a read-only folder,
    ``<folder name>.checkpoints`` in the current folder instead: the bundled
    scenarios are never written to.
    """
    model = Path(model).resolve()
    package = Path(__file__).resolve().parent.parent  # the stepper package
    bundled = model.is_relative_to(package) or model.is_relative_to(scenarios_root().resolve())
    if bundled or not os.access(model.parent, os.W_OK):
        return Path.cwd() / f"{model.parent.name}.checkpoints"
    return model.parent / f"{model.stem}.checkpoints"


def default_journal_for(model: Path) -> Path:
    """A new journal file name for a session starting now, used by no other session."""
    return new_journal_path(session_folder_for(model))
