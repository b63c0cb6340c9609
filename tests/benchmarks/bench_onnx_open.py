"""Opening a network that comes as ONNX, against the same network described in a model file.

Run: .venv/bin/python tests/benchmarks/bench_onnx_open.py

The network is bench_ui.py's (20 inputs, 400 tanh units, 4 linear outputs,
10,004 weights, 320 rows), written once as ``[[layers]]`` in ``model.toml``
and once as an ONNX file (Gemm with transB = 1, as PyTorch exports a Linear;
Tanh; Gemm) named by ``onnx.toml`` (``network = "net.onnx"``), with the same
data. Measured in interleaved rounds on the same machine, medians reported:

1. fresh interpreter to the app's first full screen, headless (goal for the
   ONNX model: under 1.5 s), and the ratio ONNX / model file;
2. the same through a real terminal (``stepper open`` in an 80x24 tmux pane,
   until the table and the plot show), when tmux is there;
3. ``stepper --help`` in a fresh interpreter, and whether it imported onnx (it must not).
"""

from __future__ import annotations

import os
import resource
import statistics
import subprocess
import sys
import tempfile
import time
from pathlib import Path

import numpy as np

sys.path.insert(0, str(Path(__file__).resolve().parent))
from bench_ui import N_HIDDEN, N_IN, N_OUT, startup_headless, startup_tmux, write_model  # noqa: E402

ROUNDS = 5


def write_onnx(folder: Path) -> Path:
    """``onnx.toml`` naming ``net.onnx``, the model file's network with its starting weights."""
    import onnx
    from onnx import TensorProto, helper, numpy_helper

    from stepper.formats.model_file import load_setup

    setup = load_setup(folder / "model.toml")
    views = setup.network.views(setup.theta0)
    inits = [numpy_helper.from_array(np.ascontiguousarray(views[0]["W"].T), "0.weight"),
             numpy_helper.from_array(views[0]["b"], "0.bias"),
             numpy_helper.from_array(np.ascontiguousarray(views[1]["W"].T), "2.weight"),
             numpy_helper.from_array(views[1]["b"], "2.bias")]
    nodes = [helper.make_node("Gemm", ["x", "0.weight", "0.bias"], ["h"], transB=1),
             helper.make_node("Tanh", ["h"], ["a"]),
             helper.make_node("Gemm", ["a", "2.weight", "2.bias"], ["y"], transB=1)]
    graph = helper.make_graph(nodes, "bench", [helper.make_tensor_value_info("x", TensorProto.DOUBLE, ["N", N_IN])],
                              [helper.make_tensor_value_info("y", TensorProto.DOUBLE, ["N", N_OUT])], inits)
    model = helper.make_model(graph, opset_imports=[helper.make_opsetid("", 17)])
    model.ir_version = 8
    onnx.save(model, str(folder / "net.onnx"))
    text = (folder / "model.toml").read_text(encoding="utf-8")
    data = text[text.index("[data]"):text.index("[init]")]
    (folder / "onnx.toml").write_text(f'name = "ten thousand weights, ONNX"\nloss = "mean_squared_error"\n'
                                      f'network = "net.onnx"\n{data}', encoding="utf-8")
    same = load_setup(folder / "onnx.toml")
    assert same.theta0.tobytes() == setup.theta0.tobytes() and N_HIDDEN == same.network.layers[0].n_out
    return folder / "onnx.toml"


def cpu_of(fn: object, *args: object) -> tuple[list[float], float]:
    """``fn(*args)``'s result and the CPU seconds its child processes used (less sensitive to a busy machine)."""
    before = resource.getrusage(resource.RUSAGE_CHILDREN)
    result = fn(*args)  # type: ignore[operator]
    after = resource.getrusage(resource.RUSAGE_CHILDREN)
    return result, (after.ru_utime - before.ru_utime) + (after.ru_stime - before.ru_stime)


def help_run() -> tuple[float, bool]:
    """Milliseconds of ``stepper --help`` in a fresh interpreter, and whether onnx got imported."""
    code = ("import time, sys\nt0 = time.perf_counter()\nfrom stepper import cli\n"
            "try:\n    cli.main(['--help'])\nexcept SystemExit:\n    pass\n"
            "print((time.perf_counter() - t0) * 1000, 'onnx' in sys.modules, file=sys.stderr)\n")
    done = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True, check=True)
    ms, imported = done.stderr.strip().splitlines()[-1].split()
    return float(ms), imported == "True"


def main() -> None:
    with tempfile.TemporaryDirectory() as tmp:
        folder = Path(tmp)
        toml = write_model(folder)
        onnx_model = write_onnx(folder)
        print(f"model: {N_IN}-{N_HIDDEN}-{N_OUT}, 10,004 weights; OPENBLAS_NUM_THREADS="
              f"{os.environ.get('OPENBLAS_NUM_THREADS', 'unset')}, {os.cpu_count()} cores; {ROUNDS} interleaved rounds")
        head: dict[str, list[float]] = {"model file": [], "onnx": []}
        cpu: dict[str, list[float]] = {"model file": [], "onnx": []}
        real: dict[str, list[float]] = {"model file": [], "onnx": []}
        helps: list[float] = []
        imported = False
        for _ in range(ROUNDS):
            for label, path in (("model file", toml), ("onnx", onnx_model)):
                wall, seconds = cpu_of(startup_headless, path, 1)
                head[label] += wall
                cpu[label].append(seconds * 1000)
                terminal = startup_tmux(path, runs=1)
                if terminal is not None:
                    real[label] += terminal
            ms, onnx_imported = help_run()
            helps.append(ms)
            imported |= onnx_imported
        h_toml, h_onnx = statistics.median(head["model file"]), statistics.median(head["onnx"])
        print(f"first screen, fresh interpreter, headless: ONNX {h_onnx:.0f} ms, model file {h_toml:.0f} ms, "
              f"ratio {h_onnx / h_toml:.2f} (goal for ONNX: < 1500 ms)")
        c_toml, c_onnx = statistics.median(cpu["model file"]), statistics.median(cpu["onnx"])
        print(f"  CPU time of those runs (user + system): ONNX {c_onnx:.0f} ms, model file {c_toml:.0f} ms, "
              f"ratio {c_onnx / c_toml:.2f}; load average {os.getloadavg()[0]:.1f} on {os.cpu_count()} cores")
        if real["onnx"]:
            r_toml, r_onnx = statistics.median(real["model file"]), statistics.median(real["onnx"])
            print(f"first screen in tmux 80x24 (stepper open): ONNX {r_onnx:.0f} ms, model file {r_toml:.0f} ms, "
                  f"ratio {r_onnx / r_toml:.2f}")
        else:
            print("first screen in a terminal: skipped, tmux is not installed")
        print(f"stepper --help, fresh interpreter: median {statistics.median(helps):.0f} ms; "
              f"onnx imported: {'YES (a defect)' if imported else 'no'}")
        t0 = time.perf_counter()
        from stepper.formats.model_file import load_setup

        load_setup(onnx_model)
        print(f"(in this process, onnx already imported: load_setup of the ONNX model "
              f"{(time.perf_counter() - t0) * 1000:.0f} ms)")


if __name__ == "__main__":
    main()
