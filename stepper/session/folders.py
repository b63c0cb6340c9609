"""Where a session's checkpoints and journals go by default."""

from __future__ import annotations

import os
from datetime import datetime
from pathlib import Path


def session_folder_for(model: Path) -> Path:
    """Where checkpoints and journals of sessions over ``model`` go by default.

    ``<model stem>.checkpoints`` beside the model file; for a bundled scenario
    inside the installed package, or a model in a read-only folder,
    ``<folder name>.checkpoints`` in the current folder instead.
    """
    model = Path(model).resolve()
    package = Path(__file__).resolve().parent.parent  # the stepper package
    if model.is_relative_to(package) or not os.access(model.parent, os.W_OK):
        return Path.cwd() / f"{model.parent.name}.checkpoints"
    return model.parent / f"{model.stem}.checkpoints"


def default_journal_for(model: Path) -> Path:
    """A new journal file name for a session starting now."""
    return session_folder_for(model) / f"journal-{datetime.now():%Y%m%d-%H%M%S}.jsonl"
