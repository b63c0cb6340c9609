"""Options that give an ONNX file named on the command line its data: ``--data``, ``--targets``, ...

``stepper check net.onnx --data data.csv --targets y --loss mean_squared_error``
works like a model file holding ``network = "net.onnx"`` and a ``[data]``
table: the options are turned into that document and checked the same way.
"""

from __future__ import annotations

import argparse
import dataclasses
import json
from pathlib import Path
from typing import Any

from stepper.errors import UsageError
from stepper.formats.model_file import Setup, setup_from_doc

OPTIONS = ("data", "targets", "inputs", "loss")




def wants_graph(args: argparse.Namespace, model: Path) -> bool:
    """True when ``model`` is an ONNX file to be given its data by the options."""
    given = [f"--{name}" for name in OPTIONS if getattr(args, name, None) is not None]
    if model.suffix.lower() == ".onnx":
        return True
    if given:
        raise UsageError(f"{', '.join(given)}: only with an ONNX file named directly; a model file names its "
                         "data in its [data] table")
    return False


def load_graph_setup(args: argparse.Namespace, model: Path) -> Setup:
    """The setup of an ONNX file and the data the options name."""
    missing = [f"--{name}" for name in ("data", "targets", "loss") if getattr(args, name) is None]
    if missing:
        raise UsageError(f"{model}: an ONNX file holds the network but not its data: give "
                         f"{', '.join(missing)} (or name it in a model file: network = \"{model.name}\")")
    data: dict[str, object] = {
        "file": str(Path(args.data).resolve()),
        "targets": _columns("--targets", args.targets),
        "inputs": "*" if args.inputs is None else _columns("--inputs", args.inputs),
    }
    doc = {"name": model.stem, "network": model.name, "loss": args.loss, "data": data}
    return graph_setup(doc, model)


def graph_setup(doc: dict[str, Any], model: Path) -> Setup:
    """The setup of ONNX file ``model`` and the document the options built (also a journal's, on replay)."""
    options = json.dumps(doc, sort_keys=True).encode("utf-8")
    setup = setup_from_doc(doc, model, options, label=f"{model} (with the data options)")
    return dataclasses.replace(setup, document=doc)


def _columns(option: str, text: str) -> list[str]:
    names = [name.strip() for name in text.split(",")]
    if not all(names):
        raise UsageError(f"{option} {text!r}: expected column names separated by commas")
    return names
