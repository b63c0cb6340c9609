"""``stepper export``: the current weights as an ONNX file or a framework's safetensors file."""

from __future__ import annotations

import argparse
import sys
from pathlib import Path
from typing import Any

from stepper.commands.common import add_model_argument, load
from stepper.formats.checkpoint import load_checkpoint
from stepper.formats.export import export_weights
from stepper.formats.weight_sources import DTYPES
from stepper.formats.weights_export import LAYOUTS


def add_parser(subs: Any) -> None:
    p = subs.add_parser(
        "export",
        help="write the weights as ONNX, or as safetensors in PyTorch's or Stepper's layout",
        description="Write a model's weights (its starting ones, or a checkpoint's with --resume) for "
        "another program: an ONNX file of the whole network that onnxruntime runs, or a safetensors "
        "file in PyTorch's layout (the names and arrangement the weights came in, or an nn.Sequential's "
        "0.weight (out, in), 0.bias, ...) or in Stepper's own (L1.W (in, out), L1.b). The format follows "
        "the suffix of --to. Exit code: 0 written, 2 bad input.",
    )
    add_model_argument(p)
    p.add_argument("--resume", type=Path, default=None, metavar="CK", help="the weights of this checkpoint")
    p.add_argument("--to", type=Path, required=True, metavar="PATH", help="the file to write: .onnx or .safetensors")
    p.add_argument("--layout", choices=LAYOUTS, default=None,
                   help="safetensors only: torch (default) or stepper")
    p.add_argument("--dtype", choices=DTYPES, default=None,
                   help="float type written (default: the one the weights came in; float64 for Stepper's own)")
    p.set_defaults(handler=handle)


def handle(args: argparse.Namespace) -> int:
    setup = load(args)
    theta = setup.theta0
    inputs: tuple[Path, ...] = ()
    if args.resume is not None:
        theta = load_checkpoint(args.resume, setup.network.layout).theta
        inputs = (args.resume,)
    done = export_weights(setup, theta, args.to, args.layout, args.dtype, inputs)
    what = "ONNX" if done.kind == "onnx" else f"safetensors, {done.layout} layout"
    out = sys.stdout
    out.write(f"wrote {done.path} ({what}, {done.dtype}, {setup.network.n_params} weights)\n")
    out.write(f"training cost at the weights written: {done.written_cost:.10g}")
    if done.written_cost != done.cost:
        out.write(f" (Stepper's, before rounding to {done.dtype}: {done.cost:.10g})")
    out.write("\n")
    return 0
