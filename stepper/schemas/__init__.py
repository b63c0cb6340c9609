"""JSON Schemas (draft 2020-12) of the documents that ``--json`` prints, one file per subcommand.

``check.json``, ``run.json``, ``slice.json``, ``explain.json``, ``samples.json``,
``diff.json`` and ``rates.json`` ship inside the package; :func:`schema` reads one::

    from stepper.schemas import schema
    jsonschema.validate(document, schema("check"))

Every document carries ``"schema_version": 1`` (README, "JSON documents and
their schemas", says what the version promises).
"""

from __future__ import annotations

import json
from importlib import resources
from typing import Any

#: The subcommands whose ``--json`` document has a schema here.
NAMES = ("check", "run", "slice", "explain", "samples", "diff", "rates")


def schema(name: str) -> dict[str, Any]:
    """The JSON Schema of ``stepper NAME --json``'s document, as a dict."""
    if name not in NAMES:
        raise KeyError(f"no schema for {name!r} (there are: {', '.join(NAMES)})")
    text = resources.files(__name__).joinpath(f"{name}.json").read_text(encoding="utf-8")
    loaded: dict[str, Any] = json.loads(text)
    return loaded
