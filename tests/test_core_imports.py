"""The numerical core imports only numpy, the standard library and itself (DEVELOPERS.md, Architecture)."""

from __future__ import annotations

import ast
import sys
from pathlib import Path

import stepper.core

CORE = Path(stepper.core.__file__).parent


def forbidden_imports(path: Path) -> list[str]:
    """Modules imported anywhere in ``path`` (also inside functions) that the core may not use."""
    tree = ast.parse(path.read_text(encoding="utf-8"))
    names: list[str] = []
    for node in ast.walk(tree):
        if isinstance(node, ast.Import):
            names.extend(alias.name for alias in node.names)
        elif isinstance(node, ast.ImportFrom) and node.level == 0 and node.module:
            names.append(node.module)
        elif isinstance(node, ast.ImportFrom):
            names.append("." * node.level + (node.module or ""))  # relative: spell it out instead
    return [name for name in names
            if not (name.split(".")[0] in sys.stdlib_module_names or name.split(".")[0] == "numpy"
                    or name == "stepper.core" or name.startswith("stepper.core."))]


def test_core_imports_only_numpy_stdlib_and_core() -> None:
    files = sorted(CORE.rglob("*.py"))  # the layers package too
    assert len(files) >= 8
    for path in files:
        assert forbidden_imports(path) == [], path.relative_to(CORE)


def test_forbidden_imports_are_found(tmp_path: Path) -> None:
    sample = tmp_path / "sample.py"
    sample.write_text("import math\nimport numpy as np\nfrom stepper.core.layers import Dense\n"
                      "def f():\n    from stepper.formats import model_file\n    import textual\n"
                      "from . import sibling\n", encoding="utf-8")
    assert sorted(forbidden_imports(sample)) == [".", "stepper.formats", "textual"]
