"""Finding the bundled scenarios, in a source checkout or an installed package."""

from __future__ import annotations

from pathlib import Path

DEFAULT = "bakery-demand"


def scenarios_root() -> Path:
    """Folder holding one sub-folder per bundled scenario."""
    here = Path(__file__).resolve().parent
    checkout = here.parent / "scenarios"
    if (checkout / DEFAULT / "model.toml").is_file():
        return checkout
    # Installed from a wheel: pyproject.toml ships the folder as stepper/_scenarios.
    return here / "_scenarios"


def scenario_names() -> list[str]:
    root = scenarios_root()
    return sorted(p.name for p in root.iterdir() if (p / "model.toml").is_file())


def default_model() -> Path:
    """The model file of the default scenario."""
    return scenarios_root() / DEFAULT / "model.toml"


def resolve_model(arg: str | None) -> Path:
    """A model path from the command line: a file, a scenario folder, a bundled name, or the default."""
    if arg is None:
        return default_model()
    path = Path(arg)
    try:
        if path.is_dir() and (path / "model.toml").is_file():
            return path / "model.toml"
        if not path.exists() and "/" not in arg and not arg.endswith(".toml"):
            candidate = scenarios_root() / arg / "model.toml"
            if candidate.is_file():
                return candidate
    except (OSError, ValueError):
        # A name the system refuses (too long, a NUL byte): reading it will say so.
        pass
    return path
