"""The package type-checks under mypy's strict mode (settings in pyproject.toml)."""

from __future__ import annotations

import subprocess
import sys
from pathlib import Path

import pytest

ROOT = Path(__file__).resolve().parent.parent


def test_mypy_strict_passes_on_the_package(tmp_path: Path) -> None:
    pytest.importorskip("mypy", reason="mypy comes with the test extra: pip install '.[test]'")
    result = subprocess.run(
        [sys.executable, "-m", "mypy", "--cache-dir", str(tmp_path / "cache"), "stepper"],
        cwd=ROOT, capture_output=True, text=True, timeout=600,
    )
    assert result.returncode == 0, result.stdout + result.stderr
