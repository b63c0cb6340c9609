"""``stepper export``: the current weights as an ONNX file or a framework's safetensors file."""

from __future__ import annotations

import argparse
import sys
from pathlib import Path

from stepper.commands.common import load, saved_step
from stepper.formats.checkpoint import load_checkpoint
from stepper.formats.export import export_weights


def handle(args: argparse.Namespace) -> int:
    setup = load(args)
    net = setup.network
    theta, state, step = setup.theta0, None, 0
    inputs: tuple[Path, ...] = ()
    if args.resume is not None:
        # The running statistics of a batch norm come with the weights (an ONNX file holds them), and
        # the training cost printed is the one at the checkpoint's step (its dropout masks).
        data = load_checkpoint(args.resume, net.layout, net.state_layout)
        theta, state = data.theta, data.state
        step = saved_step(setup, args.resume, data)
        inputs = (args.resume,)
    done = export_weights(setup, theta, args.to, args.layout, args.dtype, inputs, state=state, step=step)
    what = "ONNX" if done.kind == "onnx" else f"safetensors, {done.layout} layout"
    out = sys.stdout
    out.write(f"wrote {done.path} ({what}, {done.dtype}, {setup.network.n_params} weights)\n")
    out.write(f"training cost at the weights written: {done.written_cost:.10g}")
    if done.written_cost != done.cost:
        out.write(f" (Stepper's, before rounding to {done.dtype}: {done.cost:.10g})")
    out.write("\n")
    if done.evaluation_cost is not None:
        out.write(f"evaluation cost at the weights written (no dropout, batch norm on its running statistics; what "
                  f"an inference runtime computes on the training rows): {done.evaluation_cost:.10g}\n")
    return 0
