"""Every ``--json`` document validates against its JSON Schema, shipped in the package (stepper/schemas/).

The schemas are JSON Schema draft 2020-12 (https://json-schema.org/draft/2020-12/json-schema-core,
the specification) and are checked with the general-purpose ``jsonschema`` package, not with code
of ours: real outputs of every subcommand on the bundled scenarios, in the situations that change a
document's shape (a custom layer, weights from ONNX, mini-batches, a schedule, a run stopped by a
runaway cost, classes, yes/no outputs and regression).
"""

from __future__ import annotations

import argparse
import contextlib
import copy
import hashlib
import io
import json
from importlib import resources
from pathlib import Path
from typing import Any, Iterator

import jsonschema
import pytest
from jsonschema import Draft202012Validator

from stepper import cli
from stepper.schemas import NAMES, schema

#: (case id, the arguments before --json, the exit codes it may end with)
CASES: list[tuple[str, list[str], tuple[int, ...]]] = [
    ("check-plain", ["check", "kiln-tiny"], (0,)),
    ("check-custom-layer-fails", ["check", "hive-gate-buggy"], (1,)),
    ("check-onnx", ["check", "glasshouse-vents", "--method", "forward"], (0,)),
    ("check-share-and-directions", ["check", "seed-sorter", "--weights", "10%", "--directions", "2"], (0, 1)),
    ("check-directions-only", ["check", "sensor-drift", "--directions", "3"], (0, 1)),
    # built-in layers: a 2-D convolution with pooling; a 1-D convolution with batch norm and dropout
    ("check-conv2d", ["check", "glaze-defects", "--weights", "2%"], (0,)),
    ("check-conv1d-norm", ["check", "fan-bearing", "--weights", "10%"], (0,)),
    ("check-resumed-problems-only", ["check", "bakery-demand", "--resume", "{ck}", "--problems-only"], (0, 1)),
    ("run-classes", ["run", "seed-sorter", "--steps", "5", "--rate", "0.3", "--save", "{ck}"], (0,)),
    ("run-binary-schedule", ["run", "sensor-drift", "--steps", "6", "--rule", "adam", "--rate", "0.01",
                             "--batch", "16", "--schedule", "cosine:steps=10,warmup=2", "--clip-norm", "1",
                             "--l2", "0.001", "--weight-decay", "0.01"], (0,)),
    ("run-no-steps", ["run", "bakery-demand", "--steps", "0", "--schedule", "step:every=5,factor=0.5"], (0,)),
    ("run-conv1d-norm", ["run", "fan-bearing", "--steps", "3", "--batch", "16"], (0,)),
    ("run-runaway", ["run", "bakery-demand", "--steps", "20", "--rate", "5"], (1,)),
    ("slice", ["slice", "bakery-demand", "L2.b[0]"], (0,)),
    ("slice-diverges", ["slice", "kiln-tiny", "L1.W[0,0]", "--rate", "1000"], (0,)),
    ("explain", ["explain", "bakery-demand", "L1.W[3,2]"], (0,)),
    # a kernel entry: no per-unit factors, its channel's health instead
    ("explain-channel", ["explain", "glaze-defects", "L1.K[0,0,0,0]"], (0,)),
    ("explain-softmax", ["explain", "seed-sorter", "L2.b[1]", "--sample-index", "3"], (0,)),
    ("samples-classes", ["samples", "seed-sorter", "--worst", "4"], (0,)),
    ("samples-binary", ["samples", "sensor-drift", "--split", "both", "--threshold", "0.4"], (0,)),
    ("samples-conv2d", ["samples", "glaze-defects", "--worst", "3"], (0,)),
    ("samples-regression", ["samples", "bakery-demand", "--all", "--sort", "line"], (0,)),
    ("diff", ["diff", "bakery-demand", "{ck}"], (0,)),
    # the largest rate's cost stops being finite at step 19 (diverged_at_step)
    ("rates", ["rates", "bakery-demand", "--steps", "30", "--count", "3", "--low", "0.01", "--high", "1e8"], (0,)),
]


def run_cli(argv: list[str]) -> tuple[int, str, str]:
    out, err = io.StringIO(), io.StringIO()
    with contextlib.redirect_stdout(out), contextlib.redirect_stderr(err):
        code = cli.main(argv)
    return code, out.getvalue(), err.getvalue()


@pytest.fixture(scope="module")
def checkpoint(tmp_path_factory: pytest.TempPathFactory) -> Path:
    """A checkpoint of bakery-demand after a few steps (for --resume and diff)."""
    path = tmp_path_factory.mktemp("ck") / "trained.safetensors"
    code, _, err = run_cli(["run", "bakery-demand", "--steps", "10", "--rate", "0.05", "--save", str(path)])
    assert code == 0, err
    return path


@pytest.fixture(scope="module")
def documents(checkpoint: Path, tmp_path_factory: pytest.TempPathFactory) -> dict[str, dict[str, Any]]:
    """Each case's document, parsed (the commands run once for the whole module)."""
    docs: dict[str, dict[str, Any]] = {}
    folder = tmp_path_factory.mktemp("docs")
    for case, argv, codes in CASES:
        ck = checkpoint if argv[0] != "run" else folder / f"{case}.safetensors"
        args = [a.replace("{ck}", str(ck)) for a in argv] + ["--json"]
        code, out, err = run_cli(args)
        assert code in codes, (case, code, err)
        docs[case] = json.loads(out)
    return docs


def validator(name: str) -> Draft202012Validator:
    return Draft202012Validator(schema(name))


# -- the schemas themselves --------------------------------------------------------------------


def json_commands() -> set[str]:
    """The subcommands whose parser has a --json option."""
    parser = cli.build_parser()
    subs = next(a for a in parser._actions if isinstance(a, argparse._SubParsersAction))
    return {name for name, sub in subs.choices.items()
            if any("--json" in action.option_strings for action in sub._actions)}


def test_every_json_document_has_a_schema_and_every_schema_a_command() -> None:
    assert set(NAMES) == json_commands()
    shipped = {p.name for p in resources.files("stepper.schemas").iterdir() if p.name.endswith(".json")}
    assert shipped == {f"{name}.json" for name in NAMES}


@pytest.mark.parametrize("name", NAMES)
def test_each_schema_is_a_valid_draft_2020_12_schema(name: str) -> None:
    doc = schema(name)
    assert doc["$schema"] == "https://json-schema.org/draft/2020-12/schema"
    Draft202012Validator.check_schema(doc)
    assert doc["properties"]["schema_version"] == {"description": "the layout's version; 1 for this schema",
                                                   "const": 1}
    assert doc["required"][:2] == ["schema_version", "model"]


def test_an_unknown_schema_name_is_refused() -> None:
    with pytest.raises(KeyError, match="no schema for 'open'"):
        schema("open")


# -- real documents ----------------------------------------------------------------------------


@pytest.mark.parametrize("case", [c[0] for c in CASES])
def test_real_documents_validate_against_their_schema(documents: dict[str, dict[str, Any]], case: str) -> None:
    doc = documents[case]
    name = case.split("-")[0]
    validator(name).validate(doc)
    assert doc["schema_version"] == 1
    assert list(doc)[:2] == ["schema_version", "model"]


def test_every_command_names_the_model_the_same_way(documents: dict[str, dict[str, Any]]) -> None:
    """``model`` is one object everywhere: the same name, path and SHA-256 for the same model file."""
    cases = [case for case, argv, _ in CASES if "bakery-demand" in argv]
    assert {case.split("-")[0] for case in cases} == set(NAMES)
    models = [documents[case]["model"] for case in cases]
    assert all(model == models[0] for model in models)
    path = Path(models[0]["path"])
    assert path.name == "model.toml" and path.parent.name == "bakery-demand"
    assert models[0]["sha256"] == hashlib.sha256(path.read_bytes()).hexdigest()


def objects_in(value: Any, path: tuple[Any, ...] = ()) -> Iterator[tuple[Any, ...]]:
    """The path of every JSON object in ``value``, itself included; only the first item of each list."""
    if isinstance(value, dict):
        yield path
        for key, item in value.items():
            yield from objects_in(item, path + (key,))
    elif isinstance(value, list) and value:
        yield from objects_in(value[0], path + (0,))


def at(doc: Any, path: tuple[Any, ...]) -> Any:
    for key in path:
        doc = doc[key]
    return doc


@pytest.mark.parametrize("case", ["check-custom-layer-fails", "check-onnx", "check-share-and-directions",
                                  "check-conv2d", "run-binary-schedule", "slice", "explain", "explain-channel",
                                  "samples-classes", "samples-binary", "diff", "rates"])
def test_a_field_the_schema_does_not_declare_is_refused_at_every_level(
        documents: dict[str, dict[str, Any]], case: str) -> None:
    """A document that gains a field fails validation until its schema declares the field.

    The field is added to every object of the document in turn (the top, ``model``, each row...).
    """
    doc = documents[case]
    check = validator(case.split("-")[0])
    paths = list(objects_in(doc))
    assert len(paths) >= 3  # at least the top, model and one object of the document's own
    for path in paths:
        changed = copy.deepcopy(doc)
        at(changed, path)["undeclared"] = 0
        errors = list(check.iter_errors(changed))
        assert errors, f"{case}: a new field at {path} passed"
        assert any("undeclared" in e.message for e in errors), [e.message for e in errors]


@pytest.mark.parametrize("case", ["check-plain", "run-classes", "slice", "explain", "explain-channel",
                                  "samples-regression", "diff", "rates"])
def test_a_missing_field_or_a_wrong_version_is_refused(documents: dict[str, dict[str, Any]], case: str) -> None:
    doc = documents[case]
    check = validator(case.split("-")[0])
    for key in doc:
        cut = {k: v for k, v in doc.items() if k != key}
        assert not check.is_valid(cut), f"{case}: {key} may be left out"
    with pytest.raises(jsonschema.ValidationError):
        check.validate({**doc, "schema_version": 2})
    with pytest.raises(jsonschema.ValidationError):
        check.validate({**doc, "model": doc["model"]["path"]})


# -- one shape per field -----------------------------------------------------------------------


def resolved(node: Any, defs: dict[str, Any]) -> Any:
    """``node`` with local ``$ref``s replaced by what they point to, and without descriptions."""
    if isinstance(node, dict):
        if "$ref" in node:
            return resolved(defs[node["$ref"].removeprefix("#/$defs/")], defs)
        return {k: resolved(v, defs) for k, v in node.items() if k not in ("description", "title")}
    if isinstance(node, list):
        return [resolved(v, defs) for v in node]
    return node


def test_a_field_has_one_shape_across_documents() -> None:
    """The same top-level field (and the same definition) means the same shape in every schema."""
    seen: dict[str, tuple[str, Any]] = {}
    defs_seen: dict[str, tuple[str, Any]] = {}
    shared = 0
    for name in NAMES:
        doc = schema(name)
        defs = doc.get("$defs", {})
        for key, sub in doc["properties"].items():
            shape = resolved(sub, defs)
            if key in seen:
                shared += 1
                assert shape == seen[key][1], f"{key}: {name} and {seen[key][0]} differ"
            seen[key] = (name, shape)
        for key, sub in defs.items():
            if key in defs_seen:
                assert sub == defs_seen[key][1], f"$defs/{key}: {name} and {defs_seen[key][0]} differ"
            defs_seen[key] = (name, sub)
    assert shared >= 14  # schema_version and model in all seven, and a few more
    assert seen["model"][1] == {
        "type": "object", "additionalProperties": False, "required": ["name", "path", "sha256"],
        "properties": {"name": {"type": "string"}, "path": {"type": "string"},
                       "sha256": {"type": "string", "pattern": "^[0-9a-f]{64}$"}},
    }
