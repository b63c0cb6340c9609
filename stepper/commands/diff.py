"""``stepper diff A B``: two checkpoints of one model compared (costs, each layer's change, direction)."""

from __future__ import annotations

import argparse
import sys
import tomllib
from pathlib import Path
from typing import Any

import numpy as np

from stepper.commands.json_output import document_head, write_json
from stepper.core.weightdiff import WeightDiff
from stepper.errors import UsageError
from stepper.formats.checkpoint import read_meta
from stepper.formats.layer_keys import TYPES
from stepper.formats.model_file import Setup, load_setup
from stepper.scenarios import resolve_model
from stepper.session import Session
from stepper.training_report import diff_lines, finite_or_none




def _is_checkpoint(text: str) -> bool:
    return text.endswith(".safetensors")


def _model_for(args: argparse.Namespace) -> Setup:
    """The model: --model, else A or B when one is a model, else the model file B (then A) was saved from."""
    if args.model is not None:
        return load_setup(resolve_model(args.model))
    for text in (args.a, args.b):
        if not _is_checkpoint(text):
            return load_setup(resolve_model(text))
    saved = read_meta(Path(args.b)).get("model_file")
    if not (isinstance(saved, str) and Path(saved).is_file()):
        raise UsageError(f"{args.b}: the model file it was saved from cannot be found; name it with --model MODEL")
    if _names_code(Path(saved)):
        # A checkpoint never decides which Python code runs: the user names such a model.
        raise UsageError(f"{args.b} was saved from {saved}, whose custom layers run Python code; "
                         "name the model yourself with --model MODEL")
    return load_setup(Path(saved))


def _names_code(path: Path) -> bool:
    """True when the model file at ``path`` has a custom layer (or cannot be read to tell); its built-in
    layers (dense, conv2d, batch_norm, ...) run no code of the user's."""
    try:
        doc = tomllib.loads(path.read_text(encoding="utf-8"))
    except (OSError, UnicodeDecodeError, tomllib.TOMLDecodeError, RecursionError):
        return True
    layers = doc.get("layers")
    built_in = set(TYPES) - {"custom"}
    return not isinstance(layers, list) or any(not isinstance(l, dict) or l.get("type", "dense") not in built_in
                                               for l in layers)


def handle(args: argparse.Namespace) -> int:
    points = ([args.resume] if args.resume is not None else []) + list(args.points)
    if len(points) != 2:
        raise UsageError("diff compares two points: give A and B, or --resume A and B")
    args.a, args.b = points
    setup = _model_for(args)
    session = Session(setup)
    if _is_checkpoint(args.b):
        session.load_checkpoint(Path(args.b))  # its L2 strength sets the costs' L2 term
    if _is_checkpoint(args.a):
        a, nets_a = session.checkpoint_side(Path(args.a))
    else:
        a, nets_a = setup.theta0, session.nets_at(0, session.net.initial_state())
    data = setup.data
    result = session.compare_to(a, top=args.top, nets_a=nets_a)
    label_a = args.a if _is_checkpoint(args.a) else f"{args.a} (starting weights)"
    label_b = args.b if _is_checkpoint(args.b) else f"{args.b} (starting weights)"
    if args.json:
        write_json(document(setup, result, label_a, label_b))
    else:
        lines = [f"{setup.name}: {data.n_train} training and {data.n_val} validation samples"]
        lines += diff_lines(result, setup.network.layout.names, label_a, label_b)
        sys.stdout.write("\n".join(lines) + "\n")
    return 0


def document(setup: Setup, d: WeightDiff, label_a: str, label_b: str) -> dict[str, Any]:
    names = setup.network.layout.names
    return {
        **document_head(setup),
        "a": label_a,
        "b": label_b,
        "train_cost": {"a": d.cost_a, "b": d.cost_b},
        "validation_cost": None if d.val_a is None else {"a": d.val_a, "b": d.val_b},
        "change_norm": d.change_norm,
        "layers": [{"layer": f"L{m.index + 1}", "label": m.label, "change_norm": m.change, "norm_a": m.before,
                    "norm_b": m.after, "relative_change": finite_or_none(m.relative)} for m in d.layers],
        "cosine_with_slope_at_b": finite_or_none(d.cosine_b),
        "cosine_with_slope_at_a": finite_or_none(d.cosine_a),
        "moved_most": [{"name": names[i], "from": float(d.a[i]), "to": float(d.b[i])} for i in d.moved],
        "unchanged": int(np.count_nonzero(d.a == d.b)),
    }
