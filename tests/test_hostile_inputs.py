"""Hostile inputs through the real command: exit 2, one line on stderr, no traceback, no file changed.

Every case runs ``stepper`` as a subprocess on a folder of its own and checks
our own contract (no outside reference applies): the exit code 2 of bad input,
one line ``stepper: ...`` on stderr naming what is wrong, nothing on stderr
that looks like a traceback, and every file in the folder byte for byte as it
was (no file replaced, appended to, or created). The cases are the ones a
user meets: special files, truncated and oversized files, non-finite or
out-of-range numbers, deep nesting, outputs that are inputs, user code that
exits.
"""

from __future__ import annotations

import hashlib
import json
import os
import shutil
import struct
import subprocess
import sys
from concurrent.futures import ThreadPoolExecutor
from pathlib import Path
from typing import Any, Callable

import pytest

from stepper.formats.model_file import load_setup
from stepper.session import Session

ROOT = Path(__file__).resolve().parents[1] / "scenarios"
BAKERY = ROOT / "bakery-demand"

pytestmark = [pytest.mark.slow, pytest.mark.skipif(sys.platform == "win32", reason="FIFOs and /dev/zero are POSIX")]


def stepper(args: list[str], cwd: Path, timeout: float = 60) -> subprocess.CompletedProcess[str]:
    return subprocess.run([sys.executable, "-m", "stepper", *args], cwd=cwd, capture_output=True, text=True,
                          timeout=timeout, stdin=subprocess.DEVNULL)


def folder_state(folder: Path) -> dict[str, str]:
    """Every regular file under ``folder`` with its SHA-256 (special files by kind)."""
    out: dict[str, str] = {}
    for path in sorted(folder.rglob("*")):
        if path.is_symlink():
            out[str(path)] = "link:" + os.readlink(path)
        elif path.is_file():
            out[str(path)] = hashlib.sha256(path.read_bytes()).hexdigest()
        elif not path.is_dir():
            out[str(path)] = "special"
    return out


def bakery(folder: Path) -> Path:
    """A copy of the bakery scenario in ``folder``; returns its model file."""
    for name in ("model.toml", "data.csv"):
        shutil.copy(BAKERY / name, folder / name)
    return folder / "model.toml"


def checkpoint(folder: Path, meta: dict[str, Any] | None = None, name: str = "ck.safetensors") -> Path:
    """A real checkpoint of the bakery copy, with metadata fields replaced by ``meta``."""
    model = bakery(folder)
    s = Session(load_setup(model), rate=0.05)
    s.set_batch_size(16)
    s.step(3)
    path = s.save_checkpoint(folder / name)
    if meta:
        from safetensors.numpy import load_file, safe_open, save_file

        with safe_open(str(path), framework="numpy") as handle:
            doc = json.loads(handle.metadata()["stepper"])
        doc.update(meta)
        save_file(load_file(str(path)), str(path), metadata={"stepper": json.dumps(doc)})
    return path


def journal(folder: Path, lines: list[Any], header: dict[str, Any] | None = None) -> Path:
    """A journal of the bakery copy: a real header (fields replaced by ``header``), then ``lines``."""
    model = bakery(folder)
    path = folder / "j.jsonl"
    Session(load_setup(model), journal=path).close()
    text = path.read_text(encoding="utf-8")
    if header:
        head = json.loads(text.splitlines()[0])
        head.update(header)
        text = json.dumps(head) + "\n"
    body = "".join((line if isinstance(line, str) else json.dumps(line)) + "\n" for line in lines)
    path.write_text(text + body, encoding="utf-8")
    return path


def deep(n: int) -> str:
    return "[" * n + "]" * n


GATE_EXIT = """
import sys
import numpy as np

class Gate:
    def __init__(self, n_in, units, options):
        self.n_in, self.n_out = n_in, units
    def init(self, rng):
        return {"W": rng.normal(0, 0.5, (self.n_in, self.n_out))}
    def forward(self, params, X):
        return X @ params["W"], X
    def backward(self, params, cache, dOut):
        sys.exit(0)
"""

GATE_INTERRUPT = GATE_EXIT.replace("sys.exit(0)", "raise KeyboardInterrupt")


def custom(folder: Path, source: str, code_folder: Path | None = None) -> Path:
    model = bakery(folder)
    where = code_folder or folder
    where.mkdir(exist_ok=True)
    (where / "gate.py").write_text(source, encoding="utf-8")
    file = "gate.py" if code_folder is None else str(where / "gate.py")
    text = model.read_text(encoding="utf-8")
    cut = text.index("[[layers]]")
    model.write_text(text[:cut] + f'[[layers]]\ntype = "custom"\nfile = "{file}"\nclass = "Gate"\nunits = 3\n\n'
                     + text[cut:], encoding="utf-8")
    return model


def prepare_cases() -> dict[str, Callable[[Path], tuple[list[str], str]]]:
    """Case name -> a function that prepares ``folder`` and returns (arguments, expected text in the message)."""
    cases: dict[str, Callable[[Path], tuple[list[str], str]]] = {}

    def case(name: str) -> Callable[[Callable[[Path], tuple[list[str], str]]], Any]:
        def add(fn: Callable[[Path], tuple[list[str], str]]) -> Any:
            cases[name] = fn
            return fn
        return add

    @case("fifo as model")
    def _(f: Path) -> tuple[list[str], str]:
        os.mkfifo(f / "model.toml")
        return ["check", str(f / "model.toml")], "is not a regular file (a FIFO)"

    @case("fifo as data")
    def _(f: Path) -> tuple[list[str], str]:
        model = bakery(f)
        (f / "data.csv").unlink()
        os.mkfifo(f / "data.csv")
        return ["check", str(model)], "data.csv: is not a regular file (a FIFO)"

    @case("fifo as checkpoint")
    def _(f: Path) -> tuple[list[str], str]:
        model = bakery(f)
        os.mkfifo(f / "ck.safetensors")
        return ["run", str(model), "--resume", str(f / "ck.safetensors"), "--steps", "1"], "a FIFO"

    @case("fifo as journal")
    def _(f: Path) -> tuple[list[str], str]:
        os.mkfifo(f / "j.jsonl")
        return ["replay", str(f / "j.jsonl")], "j.jsonl: is not a regular file (a FIFO)"

    @case("/dev/zero as model")
    def _(f: Path) -> tuple[list[str], str]:
        return ["check", "/dev/zero"], "/dev/zero: is not a regular file (a character device)"

    @case("/dev/zero as checkpoint")
    def _(f: Path) -> tuple[list[str], str]:
        return ["run", str(bakery(f)), "--resume", "/dev/zero"], "a character device"

    @case("checkpoint header of 250 MB")
    def _(f: Path) -> tuple[list[str], str]:
        path = f / "big.safetensors"
        path.write_bytes(struct.pack("<Q", 250 * 1024 * 1024) + b"{" + b" " * 1000)
        return ["run", str(bakery(f)), "--resume", str(path)], "its header would be 262,144,000 bytes"

    @case("truncated checkpoint")
    def _(f: Path) -> tuple[list[str], str]:
        path = checkpoint(f)
        path.write_bytes(path.read_bytes()[: path.stat().st_size // 2])
        return ["run", str(f / "model.toml"), "--resume", str(path)], "ck.safetensors: "

    @case("checkpoint header nested 200,000 deep")
    def _(f: Path) -> tuple[list[str], str]:
        path = f / "deep.safetensors"
        text = deep(200_000).encode()
        path.write_bytes(struct.pack("<Q", len(text)) + text)
        return ["run", str(bakery(f)), "--resume", str(path)], "nested too deeply"

    for field, value, text in [("step_count", "Infinity", "Infinity is not a number JSON allows"),
                               ("batch_size", 0, "batch_size: 0 is outside [1, 192]"),
                               ("batch_size", 1000, "batch_size: 1000 is outside [1, 192]"),
                               ("batch_size", -3, "batch_size: -3 is outside [1, 192]"),
                               ("rate", "NaN", "NaN is not a number JSON allows"),
                               ("frozen", deep(200_000), "nested too deeply")]:
        @case(f"checkpoint {field} = {str(value)[:20]}")
        def _(f: Path, field: str = field, value: Any = value, text: str = text) -> tuple[list[str], str]:
            path = checkpoint(f)
            raw = path.read_bytes()
            (size,) = struct.unpack("<Q", raw[:8])
            header = json.loads(raw[8 : 8 + size])
            meta = json.loads(header["__metadata__"]["stepper"])
            meta[field] = "@@"
            header["__metadata__"]["stepper"] = json.dumps(meta).replace('"@@"', str(value))
            new = json.dumps(header).encode()
            new += b" " * (-len(new) % 8)
            path.write_bytes(struct.pack("<Q", len(new)) + new + raw[8 + size :])
            return ["run", str(f / "model.toml"), "--resume", str(path), "--steps", "1"], text

    for label, line, text in [("n = Infinity", '{"seq":1,"op":"step","n":Infinity}', "Infinity is not a number"),
                              ("n = 10**12", {"seq": 1, "op": "step", "n": 10**12}, "is outside [1, 1000000000]"),
                              ("batch 0", {"seq": 1, "op": "set_batch_size", "size": 0}, "0 is outside [1, 192]"),
                              ("seed Infinity", '{"seq":1,"op":"perturb","scale":0.1,"seed":Infinity,"names":null}',
                               "Infinity is not a number"),
                              ("nested line", '{"seq":1,"op":' + deep(200_000) + "}", "nested too deeply"),
                              ("two sessions", {"seq": 5, "op": "step", "n": 1}, "more than one session")]:
        @case(f"journal {label}")
        def _(f: Path, line: Any = line, text: str = text) -> tuple[list[str], str]:
            return ["replay", str(journal(f, [line]))], text

    @case("journal header naming a folder")
    def _(f: Path) -> tuple[list[str], str]:
        path = journal(f, [], {"model": str(f), "digest": None, "inputs": []})
        return ["replay", str(path)], f"j.jsonl: line 1: the model the journal names: {f}: is a folder"

    @case("journal of a changed data file")
    def _(f: Path) -> tuple[list[str], str]:
        path = journal(f, [{"seq": 1, "op": "step", "n": 2}])
        with open(f / "data.csv", "a", encoding="utf-8") as handle:
            handle.write("20,0,3,100,50\n")
        return ["replay", str(path)], "data.csv has changed since the journal was written"

    @case("run --seed -1")
    def _(f: Path) -> tuple[list[str], str]:
        return ["run", str(bakery(f)), "--seed", "-1"], "must be 0 or more"

    @case("slice --size 100000x100000")
    def _(f: Path) -> tuple[list[str], str]:
        return ["slice", str(bakery(f)), "L1.W[0,0]", "--size", "100000x100000", "--plot", "-"], "too large"

    @case("standardize 1e308")
    def _(f: Path) -> tuple[list[str], str]:
        model = bakery(f)
        lines = (f / "data.csv").read_text(encoding="utf-8").splitlines()
        for i in (1, 2):
            cells = lines[i].split(",")
            cells[0] = "1e308"
            lines[i] = ",".join(cells)
        (f / "data.csv").write_text("\n".join(lines) + "\n", encoding="utf-8")
        return ["check", str(model)], "data.csv: column 'temperature' cannot be standardized"

    @case("softmax output with binary cross-entropy")
    def _(f: Path) -> tuple[list[str], str]:
        model = bakery(f)
        text = model.read_text(encoding="utf-8").replace("mean_squared_error", "binary_cross_entropy")
        model.write_text(text.replace('activation = "identity"', 'activation = "softmax"'), encoding="utf-8")
        return ["check", str(model)], "binary_cross_entropy needs a sigmoid output layer"

    @case("custom layer calls sys.exit(0) in check")
    def _(f: Path) -> tuple[list[str], str]:
        return ["check", str(custom(f, GATE_EXIT))], "backward called exit (SystemExit 0)"

    @case("custom layer raises KeyboardInterrupt")
    def _(f: Path) -> tuple[list[str], str]:
        return ["check", str(custom(f, GATE_INTERRUPT))], "gate.py line 13 in backward"

    @case("replay of code outside the model's folder")
    def _(f: Path) -> tuple[list[str], str]:
        model = custom(f, GATE_EXIT.replace("sys.exit(0)", "return {'W': cache.T @ dOut}, dOut @ params['W'].T"),
                       f / "elsewhere")
        path = f / "j.jsonl"
        Session(load_setup(model), journal=path).close()
        return ["replay", str(path)], "add --run-code to run it"

    for option, target, text in [("--save", "model.toml", "is the model file"),
                                 ("--save", "data.csv", "is a file the model file reads"),
                                 ("--journal", "model.toml", "is the model file"),
                                 ("--save", "notes.txt", "exists and is not a Stepper checkpoint"),
                                 ("--journal", "notes.txt", "exists and is not a Stepper journal"),
                                 ("--save", "link.safetensors", "is a symbolic link"),
                                 ("--save", "/dev/null", "is not a regular file")]:
        @case(f"run {option} {target}")
        def _(f: Path, option: str = option, target: str = target, text: str = text) -> tuple[list[str], str]:
            model = bakery(f)
            (f / "notes.txt").write_text("my notes\n", encoding="utf-8")
            (f / "link.safetensors").symlink_to(f / "notes.txt")
            return ["run", str(model), "--steps", "2", option, target if target.startswith("/") else str(f / target)], text

    @case("run --resume ck --save ck")
    def _(f: Path) -> tuple[list[str], str]:
        path = checkpoint(f)
        return ["run", str(f / "model.toml"), "--resume", str(path), "--save", str(path)], "checkpoint to resume"

    @case("replay j --save j")
    def _(f: Path) -> tuple[list[str], str]:
        path = journal(f, [{"seq": 1, "op": "step", "n": 2}])
        return ["replay", str(path), "--save", str(path)], "is the journal being replayed"

    return cases


CASES = prepare_cases()


def test_every_hostile_input_gets_exit_2_one_line_and_changes_nothing(tmp_path: Path) -> None:
    prepared: dict[str, tuple[Path, list[str], str, dict[str, str]]] = {}
    for number, (name, prepare) in enumerate(CASES.items()):
        folder = tmp_path / f"case{number}"
        folder.mkdir()
        args, expected = prepare(folder)
        prepared[name] = (folder, args, expected, folder_state(folder))

    def run(name: str) -> tuple[str, subprocess.CompletedProcess[str]]:
        folder, args, _, _ = prepared[name]
        return name, stepper(args, folder)

    with ThreadPoolExecutor(max_workers=4) as pool:
        results = dict(pool.map(run, prepared))
    problems = []
    for name, result in results.items():
        folder, args, expected, before = prepared[name]
        lines = result.stderr.strip().splitlines()
        if result.returncode != 2:
            problems.append(f"{name}: exit {result.returncode}: {result.stderr.strip()[-300:]}")
        elif len(lines) != 1 or not lines[0].startswith("stepper: ") or "Traceback" in result.stderr:
            problems.append(f"{name}: stderr is not one line: {result.stderr[-500:]}")
        elif expected not in lines[0]:
            problems.append(f"{name}: {expected!r} not in {lines[0]!r}")
        elif folder_state(folder) != before:
            problems.append(f"{name}: files changed: {sorted(set(folder_state(folder).items()) ^ set(before.items()))}")
    assert not problems, "\n".join(problems)
    assert len(results) == len(CASES) >= 39


def test_a_model_file_with_a_byte_order_mark_is_read(tmp_path: Path) -> None:
    model = bakery(tmp_path)
    model.write_bytes(b"\xef\xbb\xbf" + model.read_bytes())
    result = stepper(["check", str(model), "--worst", "1"], tmp_path)
    assert result.returncode == 0, result.stderr
