"""``stepper samples``, ``diff`` and ``rates``, and the training options of ``run``.

Figures are checked against outside references where there is one
(scikit-learn's ``log_loss`` and ``accuracy_score`` for rows and metrics);
the rest checks our own command-line contract: exit codes 0/2, one line on
stderr for bad input, the documented JSON fields, and that an output never
overwrites an input.
"""

from __future__ import annotations

import json
from pathlib import Path
from typing import Any

import numpy as np
import pytest
from sklearn.metrics import accuracy_score, log_loss

from stepper import cli
from stepper.commands.replay import replay
from stepper.formats.model_file import load_setup
from stepper.session import Session

ROOT = Path(__file__).resolve().parents[1] / "scenarios"
SORTER = ROOT / "seed-sorter" / "model.toml"
BAKERY = ROOT / "bakery-demand" / "model.toml"


def main_json(capsys: pytest.CaptureFixture[str], *argv: str) -> dict[str, Any]:
    code = cli.main([*argv, "--json"])
    out, err = capsys.readouterr()
    assert code == 0, err
    doc: dict[str, Any] = json.loads(out)
    assert doc.get("schema_version", 1) == 1
    return doc


def bad_input(capsys: pytest.CaptureFixture[str], *argv: str) -> str:
    code = cli.main(list(argv))
    out, err = capsys.readouterr()
    assert code == 2, (out, err)
    assert err.count("\n") == 1 and err.startswith("stepper: "), err
    return err.strip()


def trained(tmp_path: Path, name: str, model: Path = SORTER, steps: int = 30, **settings: Any) -> Path:
    s = Session(load_setup(model), rate=0.3)
    for key, value in settings.items():
        getattr(s, f"set_{key}")(value)
    s.step(steps)
    return s.save_checkpoint(tmp_path / name)


# -- samples -------------------------------------------------------------------------------------


def test_samples_lists_the_worst_rows_with_their_log_loss(tmp_path: Path, capsys: pytest.CaptureFixture[str]) -> None:
    ck = trained(tmp_path, "s.safetensors")
    doc = main_json(capsys, "samples", str(SORTER), "--resume", str(ck), "--worst", "7")
    rows = doc["rows"]
    assert len(rows) == 7 and doc["rows_total"] == 300
    losses = [r["loss"] for r in rows]
    assert losses == sorted(losses, reverse=True)
    for r in rows:
        true = int(np.argmax(r["target"]))
        # sklearn.metrics.log_loss on the one row: -log of the probability given to its class.
        assert r["loss"] == pytest.approx(log_loss([true], [r["prediction"]], labels=[0, 1, 2]), rel=1e-9)
    # No listed row has a smaller loss than any row left out: check against every row.
    every = main_json(capsys, "samples", str(SORTER), "--resume", str(ck), "--all")["rows"]
    assert len(every) == 300
    assert min(losses) >= sorted((r["loss"] for r in every), reverse=True)[6]


def test_samples_metrics_match_sklearn(tmp_path: Path, capsys: pytest.CaptureFixture[str]) -> None:
    ck = trained(tmp_path, "s.safetensors")
    doc = main_json(capsys, "samples", str(SORTER), "--resume", str(ck), "--all", "--split", "validation")
    rows = doc["rows"]
    assert {r["set"] for r in rows} == {"validation"}
    true = [int(np.argmax(r["target"])) for r in rows]
    said = [int(np.argmax(r["prediction"])) for r in rows]
    assert doc["metrics"]["validation"]["accuracy"] == pytest.approx(accuracy_score(true, said))
    assert np.sum(doc["metrics"]["validation"]["confusion"]) == len(rows) == 60


def test_samples_by_line_and_the_text_report(capsys: pytest.CaptureFixture[str]) -> None:
    code = cli.main(["samples", str(BAKERY), "--worst", "4", "--sort", "line"])
    out, _ = capsys.readouterr()
    assert code == 0
    lines = out.splitlines()
    assert lines[3] == "4 of 240 rows, largest loss first"
    table = lines[5:9]
    assert [int(line.split()[1]) for line in table] == sorted(int(line.split()[1]) for line in table)
    assert "metrics (regression)" in out and "R2" in out and "MAE" in out


@pytest.mark.parametrize("argv, message", [
    (["--worst", "0"], "'0' must be at least 1"),
    (["--threshold", "1.5"], "'1.5' must be between 0 and 1"),
    (["--resume", "missing.safetensors"], "missing.safetensors: no such file"),
    (["--split", "test"], "invalid choice: 'test'"),
])
def test_samples_bad_input(capsys: pytest.CaptureFixture[str], argv: list[str], message: str) -> None:
    assert message in bad_input(capsys, "samples", str(SORTER), *argv)


# -- diff ----------------------------------------------------------------------------------------


def test_diff_of_two_checkpoints(tmp_path: Path, capsys: pytest.CaptureFixture[str]) -> None:
    a = trained(tmp_path, "a.safetensors", steps=5)
    s = Session(load_setup(SORTER))
    s.load_checkpoint(a)
    s.step(20)
    b = s.save_checkpoint(tmp_path / "b.safetensors")
    doc = main_json(capsys, "diff", str(a), str(b), "--top", "4")  # the model comes from b's metadata
    assert main_json(capsys, "diff", str(b), "--resume", str(a), "--top", "4") == doc
    before, after = Session(load_setup(SORTER)), s
    before.load_checkpoint(a)
    assert doc["train_cost"] == {"a": before.train_cost(), "b": after.train_cost()}
    change = after.theta - before.theta
    assert doc["change_norm"] == pytest.approx(float(np.linalg.norm(change)), rel=1e-12)
    assert [m["name"] for m in doc["moved_most"]] == [s.names[i] for i in np.argsort(-np.abs(change))[:4]]
    assert doc["cosine_with_slope_at_a"] < -0.5  # descent went against the slope at a


def test_diff_from_the_start_names_the_model(tmp_path: Path, capsys: pytest.CaptureFixture[str]) -> None:
    b = trained(tmp_path, "b.safetensors", model=BAKERY)
    code = cli.main(["diff", str(BAKERY), str(b)])
    out, _ = capsys.readouterr()
    assert code == 0
    assert "(starting weights)" in out and "moved most:" in out and "L1 dense 4->6 tanh" in out


def test_diff_will_not_run_code_a_checkpoint_names(tmp_path: Path, capsys: pytest.CaptureFixture[str]) -> None:
    gate = ROOT / "hive-gate-fixed" / "model.toml"
    a = trained(tmp_path, "a.safetensors", model=gate, steps=1)
    b = trained(tmp_path, "b.safetensors", model=gate, steps=3)
    message = bad_input(capsys, "diff", str(a), str(b))
    assert "custom layers run Python code; name the model yourself with --model MODEL" in message
    doc = main_json(capsys, "diff", str(a), str(b), "--model", str(gate))
    assert doc["train_cost"]["b"] < doc["train_cost"]["a"]


def test_diff_needs_two_points(tmp_path: Path, capsys: pytest.CaptureFixture[str]) -> None:
    a = trained(tmp_path, "a.safetensors", model=BAKERY, steps=1)
    message = "diff compares two points: give A and B, or --resume A and B"
    assert message in bad_input(capsys, "diff", str(a))
    assert message in bad_input(capsys, "diff", str(a), str(a), "--resume", str(a))


def test_diff_of_checkpoints_of_other_models_is_refused(tmp_path: Path, capsys: pytest.CaptureFixture[str]) -> None:
    a = trained(tmp_path, "a.safetensors", model=BAKERY, steps=1)
    b = trained(tmp_path, "b.safetensors", model=SORTER, steps=1)
    assert "tensor L1.W has shape (4, 6), the model needs (4, 8)" in bad_input(capsys, "diff", str(a), str(b))


# -- rates ---------------------------------------------------------------------------------------


def test_rates_json_and_plot(tmp_path: Path, capsys: pytest.CaptureFixture[str]) -> None:
    plot = tmp_path / "rates.txt"
    doc = main_json(capsys, "rates", str(BAKERY), "--low", "0.001", "--high", "1", "--count", "4", "--steps", "20",
                    "--plot", str(plot))
    rates = [r["rate"] for r in doc["rates"]]
    np.testing.assert_allclose(rates, [0.001, 0.01, 0.1, 1.0], rtol=1e-12)
    costs = [r["train_cost"] for r in doc["rates"]]
    best = min(range(4), key=lambda k: costs[k] if costs[k] is not None else np.inf)
    assert doc["best_rate"] == rates[best]
    # The lowest rate barely moves in 20 steps; its cost ends between the start and the best.
    assert doc["start_cost"] > costs[0] > costs[best]
    text = plot.read_text()
    assert "cost after 20 steps" in text and "rate" in text


def test_rates_options_and_refusals(tmp_path: Path, capsys: pytest.CaptureFixture[str]) -> None:
    assert "must be positive, the first no larger" in bad_input(capsys, "rates", str(BAKERY), "--low", "1",
                                                                "--high", "0.1")
    assert "is also an input" in bad_input(capsys, "rates", str(BAKERY), "--steps", "2", "--plot", str(BAKERY))
    assert "at most 64 rates" in bad_input(capsys, "rates", str(BAKERY), "--count", "65")


# -- run's training options ----------------------------------------------------------------------


def test_run_settings_are_journaled_and_saved(tmp_path: Path, capsys: pytest.CaptureFixture[str]) -> None:
    journal = tmp_path / "run.jsonl"
    save = tmp_path / "out.safetensors"
    doc = main_json(capsys, "run", str(SORTER), "--steps", "12", "--rule", "adam", "--rate", "0.05",
                    "--l2", "0.001", "--weight-decay", "0.01", "--clip-norm", "0.5",
                    "--schedule", "cosine:steps=12,warmup=2", "--journal", str(journal), "--save", str(save))
    assert doc["settings"] == {"l2": 0.001, "weight_decay": 0.01, "clip_norm": 0.5,
                               "schedule": {"kind": "cosine", "steps": 12, "warmup": 2, "floor": 0.0,
                                            "restart": False}}
    # Step 12 of the schedule: 2 warm-up steps, then T_cur = 10 of 12 (SGDR eq. 5 with eta_min = 0).
    assert doc["rate_used_next"] == pytest.approx(0.05 * 0.5 * (1 + np.cos(np.pi * 10 / 12)), rel=1e-12)
    rebuilt = replay(journal)
    again = Session(load_setup(SORTER))
    again.load_checkpoint(save)
    assert rebuilt.theta.tobytes() == again.theta.tobytes()
    assert (rebuilt.l2, rebuilt.weight_decay, rebuilt.clip_norm, rebuilt.schedule) == \
        (again.l2, again.weight_decay, again.clip_norm, again.schedule)
    assert doc["task"] == "classes"
    assert doc["metrics_after"]["train"]["accuracy"] > doc["metrics_before"]["train"]["accuracy"]
    assert doc["l2_term_after"] == pytest.approx(again.penalty())


def test_run_without_steps_reports_a_checkpoint(tmp_path: Path, capsys: pytest.CaptureFixture[str]) -> None:
    ck = trained(tmp_path, "s.safetensors")
    doc = main_json(capsys, "run", str(SORTER), "--resume", str(ck), "--steps", "0")
    assert doc["steps_done"] == 0 and doc["cost_before"] == doc["cost_after"]
    assert doc["metrics_before"] == doc["metrics_after"]


def test_run_plot_writes_histograms_and_never_over_an_input(tmp_path: Path,
                                                           capsys: pytest.CaptureFixture[str]) -> None:
    plot = tmp_path / "h.txt"
    assert cli.main(["run", str(BAKERY), "--steps", "3", "--plot", str(plot)]) == 0
    text = plot.read_text()
    for quantity in ("weights", "slopes", "updates", "activations"):
        assert f"L1 {quantity} (dense 4->6 tanh)" in text
        assert f"L2 {quantity} (dense 6->1 identity)" in text
    capsys.readouterr()
    ck = trained(tmp_path, "k.safetensors", model=BAKERY, steps=1)
    before = ck.read_bytes()
    assert "is also an input" in bad_input(capsys, "run", str(BAKERY), "--resume", str(ck), "--steps", "1",
                                           "--plot", str(ck))
    assert ck.read_bytes() == before


def test_open_takes_the_training_options() -> None:
    parser = cli.build_parser()
    args = parser.parse_args(cli.route(parser, ["seed-sorter", "--l2", "0.01", "--clip-norm", "off",
                                                "--schedule", "step:every=5,factor=0.5"]))
    assert (args.command, args.l2, args.clip_norm, args.weight_decay) == ("open", 0.01, "off", None)
    assert args.schedule.text() == "step:every=5,factor=0.5"
