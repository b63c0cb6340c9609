"""What every ``--json`` document shares: its version, the ``model`` object, and how it is written.

Each subcommand's document is described by a JSON Schema (draft 2020-12) in
``stepper/schemas/NAME.json`` (:func:`stepper.schemas.schema`); the tests
validate real outputs against them. A document starts with
``"schema_version": 1`` and the ``model`` object, then its own fields. Fields
with the same name have the same shape in every document: a new field takes a
name no other document uses for something else, and goes into its schema.
"""

from __future__ import annotations

import json
import math
import sys
from typing import IO, Any

from stepper.formats.model_file import Setup

#: The version of the documents' layout (README, "JSON documents and their schemas").
SCHEMA_VERSION = 1


def model_document(setup: Setup) -> dict[str, str]:
    """The ``model`` object of every document: the model's name, its file, and the SHA-256 of that file.

    For a model file that names an ONNX graph the digest covers the graph's bytes too
    (:attr:`stepper.formats.model_file.Setup.digest`).
    """
    return {"name": setup.name, "path": str(setup.path), "sha256": setup.digest}


def document_head(setup: Setup) -> dict[str, Any]:
    """The fields every document starts with: ``schema_version`` and ``model``."""
    return {"schema_version": SCHEMA_VERSION, "model": model_document(setup)}


def json_safe(value: Any) -> Any:
    """``value`` with every float that is not finite replaced by None, at any depth.

    JSON (RFC 8259) has no NaN or Infinity; the schemas allow null where a number can be missing.
    """
    if isinstance(value, float):
        return value if math.isfinite(value) else None
    if isinstance(value, dict):
        return {key: json_safe(item) for key, item in value.items()}
    if isinstance(value, (list, tuple)):
        return [json_safe(item) for item in value]
    return value


def write_json(doc: dict[str, Any], out: IO[str] | None = None) -> None:
    """Write ``doc`` as one JSON document (non-finite numbers as null) and a newline."""
    stream = sys.stdout if out is None else out
    json.dump(json_safe(doc), stream, indent=1, allow_nan=False)
    stream.write("\n")
