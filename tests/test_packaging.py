"""What pyproject.toml declares is what the package needs, and what the wheel carries.

References: PEP 639 (an SPDX license expression in ``project.license``; setuptools reads one from
version 77), PEP 561 (a ``py.typed`` marker makes a package's type hints count), PEP 508
(requirement strings). The floors themselves are proved by ``.ci/floors``, which installs them.
"""

from __future__ import annotations

import ast
import re
import shutil
import subprocess
import sys
import tomllib
import zipfile
from pathlib import Path

import pytest

ROOT = Path(__file__).resolve().parent.parent
PYPROJECT = tomllib.loads((ROOT / "pyproject.toml").read_text(encoding="utf-8"))
PROJECT = PYPROJECT["project"]
FLOOR = re.compile(r"([A-Za-z0-9][A-Za-z0-9._-]*)>=([0-9][0-9.]*)")


def floors(requirements: list[str]) -> dict[str, str]:
    """``{name: floor}``; every requirement must be ``NAME>=VERSION`` (the floors script pins it)."""
    out = {}
    for text in requirements:
        match = FLOOR.fullmatch(text)
        assert match, f"{text!r} is not NAME>=VERSION"
        out[match[1]] = match[2]
    return out


def imported_modules() -> set[str]:
    """Top-level names of the modules outside the standard library that stepper/ imports."""
    names: set[str] = set()
    for path in (ROOT / "stepper").rglob("*.py"):
        for node in ast.walk(ast.parse(path.read_text(encoding="utf-8"))):
            if isinstance(node, ast.Import):
                names |= {alias.name.split(".")[0] for alias in node.names}
            elif isinstance(node, ast.ImportFrom) and node.level == 0 and node.module:
                names.add(node.module.split(".")[0])
    return names - set(sys.stdlib_module_names) - {"stepper", "__future__"}


def test_every_module_the_package_imports_is_a_declared_dependency_and_nothing_else() -> None:
    # Each of these distributions installs a module of the same name.
    assert imported_modules() == set(floors(PROJECT["dependencies"]))
    # rich (progress bars, styles) and platformdirs (the log's folder) are used directly.
    assert {"rich", "platformdirs"} <= set(floors(PROJECT["dependencies"]))


def test_every_requirement_has_a_floor_and_the_schemas_validator_is_in_the_test_extra() -> None:
    test = floors(PROJECT["optional-dependencies"]["test"])
    assert "jsonschema" in test
    assert "torch" not in test and "torch" not in floors(PROJECT["dependencies"])
    assert floors(PYPROJECT["build-system"]["requires"]) == {"setuptools": "77.0.3"}


def test_the_license_is_an_spdx_expression_that_matches_the_license_file() -> None:
    assert PROJECT["license"] == "MIT"
    assert PROJECT["license-files"] == ["LICENSE"]
    assert (ROOT / "LICENSE").read_text(encoding="utf-8").startswith("MIT License\n")


def test_every_package_and_its_data_are_listed() -> None:
    setuptools = PYPROJECT["tool"]["setuptools"]
    found = {".".join(p.parent.relative_to(ROOT).parts) for p in (ROOT / "stepper").rglob("__init__.py")}
    assert found <= set(setuptools["packages"])
    data = setuptools["package-data"]
    assert "py.typed" in data["stepper"] and (ROOT / "stepper" / "py.typed").is_file()
    assert data["stepper.schemas"] == ["*.json"]


@pytest.mark.slow
def test_the_wheel_carries_py_typed_the_schemas_and_the_license_without_a_warning(tmp_path: Path) -> None:
    """Build the wheel from a copy of the sources (pip, an isolated build with setuptools >= 77)."""
    source = tmp_path / "source"
    source.mkdir()
    for name in ("pyproject.toml", "README.md", "LICENSE"):
        shutil.copy(ROOT / name, source / name)
    for name in ("stepper", "scenarios"):
        shutil.copytree(ROOT / name, source / name, ignore=shutil.ignore_patterns("__pycache__", "*.checkpoints"))
    result = subprocess.run(
        [sys.executable, "-m", "pip", "wheel", "--no-deps", "--verbose", "--wheel-dir", str(tmp_path / "dist"),
         str(source)], capture_output=True, text=True, timeout=600)
    assert result.returncode == 0, result.stdout[-3000:] + result.stderr[-3000:]
    log = result.stdout + result.stderr
    assert "SetuptoolsDeprecationWarning" not in log and "License classifiers are deprecated" not in log
    (wheel,) = (tmp_path / "dist").glob("slope_stepper-*.whl")
    with zipfile.ZipFile(wheel) as archive:
        names = set(archive.namelist())
        metadata = next(archive.read(n).decode() for n in names if n.endswith(".dist-info/METADATA"))
    assert "stepper/py.typed" in names
    schemas = {p.name for p in (ROOT / "stepper" / "schemas").glob("*.json")}
    assert {f"stepper/schemas/{name}" for name in schemas} <= names and len(schemas) == 7
    assert "License-Expression: MIT" in metadata.splitlines()
    assert "License-File: LICENSE" in metadata.splitlines()
    assert any(n.endswith(".dist-info/licenses/LICENSE") for n in names)
    assert "stepper/_scenarios/bakery-demand/model.toml" in names
