"""Journals: a replay rebuilds the session's state bit for bit, even after a crash.

These check our own contract (no outside source applies): every operation is
written as one JSON line (JSON per RFC 8259, one object per line) and flushed;
replaying the lines from the model file gives the same weights, rule memory,
settings, history and undo stack as the session that wrote them.
"""

from __future__ import annotations

import json
import re
from pathlib import Path
from typing import Any

import pytest

from stepper import cli
from stepper.commands.replay import replay
from stepper.core.schedules import Schedule
from stepper.errors import CheckpointError, UsageError
from stepper.formats.journal import read_journal
from stepper.formats.model_file import load_setup
from stepper.session import Session

ROOT = Path(__file__).resolve().parents[1] / "scenarios"
BAKERY = ROOT / "bakery-demand" / "model.toml"
KILN = ROOT / "kiln-tiny" / "model.toml"


def fingerprint(s: Session) -> tuple[Any, ...]:
    """Everything a replay must reproduce, in a form == compares exactly."""
    return (
        s.theta.tobytes(),
        s.frozen.tobytes(),
        s.rule,
        s.rule_state.t,
        tuple((k, v.tobytes()) for k, v in sorted(s.rule_state.arrays.items())),
        s.step_count,
        s.rate,
        s.slope_source,
        s.batch_size,
        tuple(s.history),
        json.dumps(s.batch_rng.bit_generator.state, sort_keys=True),
        s.can_undo,
        s.can_redo,
        s.l2,
        s.weight_decay,
        s.clip_norm,
        s.schedule,
        None if s.last_update is None else s.last_update.tobytes(),
    )


@pytest.fixture(scope="module")
def bakery():  # type: ignore[no-untyped-def]
    return load_setup(BAKERY)


def every_operation(s: Session, folder: Path) -> list[tuple[Any, ...]]:
    """Drive ``s`` through every kind of operation; the state after each."""
    states = [fingerprint(s)]

    def did() -> None:
        states.append(fingerprint(s))

    s.set_rule("momentum"); did()
    s.step(3); did()
    s.set_rate(0.02); did()
    s.set_slope_source("numeric"); did()
    s.step(2); did()
    s.set_slope_source("analytic"); did()
    s.set_batch_size(16); did()
    s.step(4); did()
    s.freeze([0, 7]); did()
    s.unfreeze([7]); did()
    s.toggle_freeze([3, 4]); did()
    s.freeze_layer(1); did()
    s.freeze_matching("L1.b[*]"); did()
    s.perturb(0.05); did()  # no seed: drawn from the session's generator, recorded
    s.perturb(0.1, [10, 11, 12], seed=8); did()
    s.set_value(5, 0.75); did()
    s.step(); did()
    s.undo(); did()
    s.undo(); did()
    s.redo(); did()
    s.save_checkpoint(folder / "mid.safetensors"); did()
    s.reset(); did()
    s.set_rule("adam"); did()
    s.step(3); did()
    s.load_checkpoint(folder / "mid.safetensors"); did()
    s.step(2); did()
    s.undo(); did()
    s.undo(); did()
    s.redo(); did()
    s.set_batch_size(None); did()
    s.step(2); did()
    s.set_l2(0.01); did()
    s.set_weight_decay(0.02); did()
    s.set_clip_norm(0.25); did()
    s.set_schedule(Schedule("cosine", steps=20, warmup=2, floor=0.1)); did()
    s.step(3); did()
    s.save_checkpoint(folder / "trained.safetensors"); did()
    s.set_clip_norm(None); did()
    s.set_schedule(Schedule()); did()
    s.set_l2(0.0); did()
    s.step(); did()
    s.load_checkpoint(folder / "trained.safetensors"); did()
    s.step(2); did()
    s.undo(); did()
    return states


def test_replay_rebuilds_every_operation_bit_for_bit(bakery, tmp_path: Path) -> None:  # type: ignore[no-untyped-def]
    journal = tmp_path / "j.jsonl"
    s = Session(bakery, journal=journal, rate=0.05)
    states = every_operation(s, tmp_path)
    s.close()
    rebuilt = replay(journal)
    assert fingerprint(rebuilt) == states[-1]
    # The undo stacks match too: take back the same things on both sides.
    for _ in range(4):
        s.undo()
        rebuilt.undo()
        assert fingerprint(rebuilt) == fingerprint(s)


def test_replay_uses_the_session_seed_rate_and_rule(bakery, tmp_path: Path) -> None:  # type: ignore[no-untyped-def]
    # A session started with its own seed, rate and rule (not the defaults)
    # must replay the same: mini-batch draws depend on the seed.
    journal = tmp_path / "seeded.jsonl"
    s = Session(bakery, journal=journal, rate=0.07, rule="momentum", seed=12)
    s.set_batch_size(10)
    s.step(6)
    s.perturb(0.01)
    s.step(2)
    s.close()
    assert fingerprint(replay(journal)) == fingerprint(s)


def test_cut_off_journal_replays_up_to_its_last_whole_line(bakery, tmp_path: Path) -> None:  # type: ignore[no-untyped-def]
    journal = tmp_path / "j.jsonl"
    s = Session(bakery, journal=journal, rate=0.05)
    states = every_operation(s, tmp_path)
    s.close()
    raw = journal.read_bytes()
    ends = [i + 1 for i, byte in enumerate(raw) if byte == ord("\n")]
    assert len(ends) == len(states)  # the header, then one line per operation
    for k in (1, 2, 9, 15, 21, len(ends) - 1):
        # A crash while writing line k+1 (0-based ops): keep a part of it.
        start, stop = ends[k - 1], ends[k]
        cut = tmp_path / f"cut{k}.jsonl"
        cut.write_bytes(raw[: start + (stop - start) // 2])
        assert fingerprint(replay(cut)) == states[k - 1], f"cut inside line {k + 1}"
        cut.write_bytes(raw[:stop])
        assert fingerprint(replay(cut)) == states[k], f"cut after line {k + 1}"


def test_appending_to_an_existing_journal_replays_the_latest_session(bakery, tmp_path: Path) -> None:  # type: ignore[no-untyped-def]
    # 'stepper run --journal j' twice: the second run starts again from the
    # model file, so the journal must rebuild the second run, not both runs
    # stacked on each other.
    journal = tmp_path / "twice.jsonl"
    first = Session(bakery, journal=journal, rate=0.05)
    first.step(5)
    first.close()
    second = Session(bakery, journal=journal, rate=0.02, seed=3)
    second.set_batch_size(30)
    second.step(4)
    second.close()
    assert fingerprint(replay(journal)) == fingerprint(second)


def test_appending_after_a_crash_cut_line(bakery, tmp_path: Path) -> None:  # type: ignore[no-untyped-def]
    journal = tmp_path / "crashed.jsonl"
    first = Session(bakery, journal=journal, rate=0.05)
    first.step(5)
    first.close()
    with open(journal, "a", encoding="utf-8") as handle:
        handle.write('{"op":"st')  # a write cut off by a crash
    second = Session(bakery, journal=journal, rate=0.05)
    second.step(2)
    second.close()
    assert fingerprint(replay(journal)) == fingerprint(second)


def test_a_session_never_saves_over_a_checkpoint_it_loaded(bakery, tmp_path: Path) -> None:  # type: ignore[no-untyped-def]
    ck = tmp_path / "ck.safetensors"
    Session(bakery, rate=0.05).save_checkpoint(ck)
    s = Session(bakery, journal=tmp_path / "j.jsonl")
    s.load_checkpoint(ck)
    s.step(3)
    with pytest.raises(UsageError, match="is a checkpoint this session loaded; an output never replaces an input"):
        s.save_checkpoint(ck)
    s.close()


def test_replay_refuses_a_checkpoint_changed_since_it_was_loaded(bakery, tmp_path: Path) -> None:  # type: ignore[no-untyped-def]
    # Another session overwrites the checkpoint the journal says was loaded;
    # replaying from the new content would give another state without saying so.
    ck = tmp_path / "ck.safetensors"
    Session(bakery, rate=0.05).save_checkpoint(ck)
    journal = tmp_path / "j.jsonl"
    s = Session(bakery, journal=journal)
    s.load_checkpoint(ck)
    s.step(3)
    other = Session(bakery)
    other.load_checkpoint(ck)
    other.step(3)
    other.save_checkpoint(tmp_path / "later.safetensors")
    other.close()
    (tmp_path / "later.safetensors").replace(ck)
    s.close()
    with pytest.raises(CheckpointError, match="has changed since") as info:
        replay(journal)
    assert info.value.message.startswith(f"{journal}: line 2: {ck}: ")
    forced = replay(journal, force=True)
    assert forced.step_count == 6  # loaded the newer file (step 3) and stepped 3 more


def test_a_broken_line_in_the_middle_is_an_error(bakery, tmp_path: Path) -> None:  # type: ignore[no-untyped-def]
    journal = tmp_path / "j.jsonl"
    s = Session(bakery, journal=journal)
    s.step(2)
    s.step(2)
    s.close()
    lines = journal.read_text(encoding="utf-8").splitlines(keepends=True)
    lines[1] = "this is not json\n"
    journal.write_text("".join(lines), encoding="utf-8")
    with pytest.raises(CheckpointError, match=r"j.jsonl: line 2: not a JSON object"):
        read_journal(journal)


@pytest.mark.parametrize("entry, message", [
    ({"op": "fly"}, "unknown journal operation 'fly'"),
    ({"op": "step"}, "step: no 'n'"),
    ({"op": "step", "n": 1e999}, "Infinity is not a number JSON allows"),
    ({"op": "step", "n": 10**12}, "step: n: 1000000000000 is outside [1, 1000000000]"),
    ({"op": "step", "n": True}, "step: n: expected a whole number, got true"),
    ({"op": "set_batch_size", "size": 0}, "set_batch_size: size: 0 is outside [1, 192]"),
    ({"op": "set_batch_size", "size": 1000}, "set_batch_size: size: 1000 is outside [1, 192]"),
    ({"op": "set_batch_size", "size": -3}, "set_batch_size: size: -3 is outside [1, 192]"),
    ({"op": "perturb", "scale": 0.1, "seed": -1, "names": None}, "perturb: seed: -1 is outside"),
    ({"op": "perturb", "scale": "big", "seed": 1, "names": None}, "perturb: scale: expected a number"),
    ({"op": "set_rate", "rate": 0}, "set_rate: rate: 0 must be a positive number"),
    ({"op": "set_rule", "rule": "lbfgs"}, "set_rule: rule: 'lbfgs' is not one of: gd, momentum, adam"),
    ({"op": "freeze", "names": ["L7.W[0,0]"]}, "freeze: names: the model has no parameter L7.W[0,0]"),
    ({"op": "freeze", "names": "L1.W[0,0]"}, "freeze: names: expected a list of names"),
    ({"op": "set_value", "name": "L1.W[0,0]", "value": None}, "set_value: value: expected a number, got null"),
])
def test_a_bad_entry_is_an_error(bakery, tmp_path: Path, entry: dict[str, Any], message: str) -> None:  # type: ignore[no-untyped-def]
    journal = tmp_path / "j.jsonl"
    Session(bakery, journal=journal).close()
    with open(journal, "a", encoding="utf-8") as handle:
        handle.write(json.dumps({"seq": 1, "op": "step", "n": 1}) + "\n")
        handle.write(json.dumps({"seq": 2, **entry}) + "\n")
    with pytest.raises(CheckpointError, match=re.escape(message)) as info:
        replay(journal)
    assert info.value.message.startswith(f"{journal}: line 3: ")


# -- the replay command ---------------------------------------------------------------------------------


def test_replay_command_saves_the_rebuilt_state(bakery, tmp_path: Path, capsys: pytest.CaptureFixture[str]) -> None:  # type: ignore[no-untyped-def]
    journal = tmp_path / "j.jsonl"
    s = Session(bakery, journal=journal, rate=0.05)
    every_operation(s, tmp_path)
    s.close()
    out_path = tmp_path / "rebuilt.safetensors"
    code = cli.main(["replay", str(journal), "--save", str(out_path)])
    out, err = capsys.readouterr()
    assert code == 0, err
    assert f"replayed {journal}: step {s.step_count}" in out
    assert f"saved {out_path}" in out
    loaded = Session(bakery)
    loaded.load_checkpoint(out_path)
    assert loaded.theta.tobytes() == s.theta.tobytes()
    assert loaded.rule_state.equals(s.rule_state)


def test_run_with_a_journal_then_replay(tmp_path: Path, capsys: pytest.CaptureFixture[str]) -> None:
    journal = tmp_path / "run.jsonl"
    saved = tmp_path / "run.safetensors"
    code = cli.main(["run", str(BAKERY), "--steps", "12", "--rate", "0.05", "--rule", "adam", "--batch", "20",
                     "--seed", "9", "--freeze", "L2.b[*]", "--journal", str(journal), "--save", str(saved)])
    assert code == 0
    rebuilt = tmp_path / "rebuilt.safetensors"
    assert cli.main(["replay", str(journal), "--save", str(rebuilt)]) == 0
    capsys.readouterr()
    a, b = Session(load_setup(BAKERY)), Session(load_setup(BAKERY))
    a.load_checkpoint(saved)
    b.load_checkpoint(rebuilt)
    assert a.theta.tobytes() == b.theta.tobytes()
    assert a.rule_state.equals(b.rule_state)
    assert a.batch_rng.bit_generator.state == b.batch_rng.bit_generator.state


@pytest.mark.parametrize("content, message", [
    ("", "empty journal"),
    ("garbage\n", "line 1: not a JSON object"),
    ('{"journal": "other"}\n', "line 1: not a Stepper journal header"),
    ('{"journal": "stepper", "version": 99}\n', "unsupported journal version 99"),
    (b"\xff\xfe\x00\n", "line 1: not a JSON object"),
])
def test_replay_command_bad_journal_exits_2(tmp_path: Path, capsys: pytest.CaptureFixture[str],
                                            content: str | bytes, message: str) -> None:
    journal = tmp_path / "bad.jsonl"
    if isinstance(content, bytes):
        journal.write_bytes(content)
    else:
        journal.write_text(content, encoding="utf-8")
    code = cli.main(["replay", str(journal)])
    out, err = capsys.readouterr()
    assert code == 2
    assert out == ""
    assert len(err.strip().splitlines()) == 1
    assert err.startswith(f"stepper: {journal}: ") and message in err


def test_replay_command_missing_journal(tmp_path: Path, capsys: pytest.CaptureFixture[str]) -> None:
    code = cli.main(["replay", str(tmp_path / "none.jsonl")])
    assert code == 2
    assert "no such journal" in capsys.readouterr().err


def test_changed_model_file_is_refused_without_force(tmp_path: Path, capsys: pytest.CaptureFixture[str]) -> None:
    model = tmp_path / "kiln.toml"
    model.write_text(KILN.read_text(encoding="utf-8").replace('"data.csv"', f'"{(KILN.parent / "data.csv").as_posix()}"'),
                     encoding="utf-8")
    journal = tmp_path / "k.jsonl"
    s = Session(load_setup(model), journal=journal, rate=1.0)
    s.step(3)
    s.close()
    model.write_text(model.read_text(encoding="utf-8").replace("[0.8, -0.4]", "[0.7, -0.4]"), encoding="utf-8")
    code = cli.main(["replay", str(journal)])
    err = capsys.readouterr().err
    assert code == 2
    assert "has changed since the journal was written" in err and "--force" in err
    assert cli.main(["replay", str(journal), "--force"]) == 0
    assert "step 3" in capsys.readouterr().out
