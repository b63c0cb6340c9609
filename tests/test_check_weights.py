"""Checking part of a model: weight names from array and index, name patterns, seeded stratified draws.

References: names and patterns are compared with the standard library's own
shell-style matching (``fnmatch.fnmatchcase``, brackets escaped so they are
literal, as ``Session.matching`` has always done) over the full list of names
that ``ParamLayout.names`` spells out; the draw's proportions with the plain
arithmetic of proportional allocation.
"""

from __future__ import annotations

import fnmatch
import json
from pathlib import Path
from typing import Any, Callable

import numpy as np
import pytest

from stepper.cli import main
from stepper.core.activations import ACTIVATIONS
from stepper.core.layers import Dense, ParamSpec
from stepper.core.names import matching, name_at, names_at
from stepper.core.network import Network
from stepper.core.selection import allocate, choose, parse_share, stratified
from stepper.scenarios import resolve_model


class ThreeAxes:
    """A stand-in layer with a 3-D and a 1-D array (only its layout is used here)."""

    n_in, n_out, label = 11, 3, "three axes"

    def param_specs(self) -> tuple[ParamSpec, ...]:
        return (ParamSpec("K", (2, 3, 12)), ParamSpec("scale", (3,), "bias"))


def layout() -> Any:
    tanh = ACTIVATIONS["tanh"]
    layers: list[Any] = [Dense(3, 11, tanh), ThreeAxes(), Dense(3, 2, tanh, bias=False),
                         Dense(2, 1, ACTIVATIONS["identity"])]
    return Network(3, layers, "mean_squared_error").layout


def spelled_out(lay: Any) -> tuple[str, ...]:
    """Every name by the documented rule (README, "Names of weights"), one by one with numpy's ndindex."""
    return tuple(f"{b.prefix}[{','.join(str(i) for i in idx)}]" for b in lay.blocks for idx in np.ndindex(*b.shape))


def reference_matches(names: tuple[str, ...], pattern: str) -> list[int]:
    escaped = "".join("[[]" if c == "[" else "[]]" if c == "]" else c for c in pattern)
    return [i for i, name in enumerate(names) if fnmatch.fnmatchcase(name, escaped)]


def test_names_from_array_and_index_are_the_full_list() -> None:
    lay = layout()
    full = spelled_out(lay)
    assert names_at(lay, np.arange(lay.size)) == list(full) == list(lay.names)
    assert len(lay.names) == len(full) and lay.names[-1] == full[-1] and lay.names[3:9] == list(full[3:9])
    for i in (0, 17, 40, lay.size - 1):
        assert full[i] in lay.names and lay.names.index(full[i]) == i == lay.index_of[full[i]] == lay.lookup(full[i])
    for wrong in ("L1.W[0,11]", "L1.W[00,1]", "L1.W[0]", "L5.W[0,0]", "L1.W[0, 1]", "x"):
        assert wrong not in lay.names and wrong not in lay.index_of
    assert lay.lookup(" L1.W[0, 1] ") == full.index("L1.W[0,1]")
    assert lay.names.widest() == max(len(name) for name in full)
    order = np.random.default_rng(3).permutation(lay.size)
    assert names_at(lay, order) == [full[i] for i in order]
    assert names_at(lay, [5, 5, 0]) == [full[5], full[5], full[0]]
    assert name_at(lay, lay.size - 1) == full[-1] == "L4.b[0]"
    assert "L2.K[1,2,11]" in full and "L2.scale[2]" in full
    with pytest.raises(IndexError):
        names_at(lay, [lay.size])


PATTERNS = ["*", "L1.*", "L1.b[*]", "*.b*", "L1.W[0,*]", "L1.W[*,3]", "L1.W[1?]", "L1.W[*]", "L1.W[*1]",
            "L?.W[2,1]", "L1.W[0,1]", "*[3]", "*3]", "L3.*", "L1.W?1*", "L1.W*", "*,6]", "L2.K[1,*,1?]",
            "L2.K[*,2]", "L2.*[2]", "*scale*", "L2.K[0,0,0]", "L9.*", "L1.W[0,10]", "L1.W[*,1*]", "L1.W[?,?]"]


@pytest.mark.parametrize("pattern", PATTERNS)
def test_pattern_matches_as_fnmatch_does(pattern: str) -> None:
    lay = layout()
    assert matching(lay, pattern).tolist() == reference_matches(spelled_out(lay), pattern)


def test_spaces_in_a_pattern_are_ignored() -> None:
    lay = layout()
    assert matching(lay, " L1.W[0, 1] ").tolist() == reference_matches(spelled_out(lay), "L1.W[0,1]") != []


# -- shares, counts and the draw --------------------------------------------------------------------


def test_share_is_parsed() -> None:
    assert parse_share("1%") == 0.01 and parse_share("0.5 %") == 0.005 and parse_share("100%") == 1.0
    assert parse_share("500") is None and parse_share("L1.*") is None
    for wrong in ("0%", "101%", "0.0%"):
        with pytest.raises(ValueError, match="more than 0% and at most 100%"):
            parse_share(wrong)


def test_allocation_is_proportional_with_at_least_one_each() -> None:
    # 1000 of 10 000 = 10%: arrays of 9000, 900, 90 and 10 entries get 900, 90, 9 and 1.
    assert allocate([9000, 900, 90, 10], 1000) == [900, 90, 9, 1]
    # 1% of the same: 90, 9, 0.9 and 0.1 rounded; the two small arrays still get one each.
    assert allocate([9000, 900, 90, 10], 100) == [90, 9, 1, 1]
    # Fewer than the arrays: one each all the same.
    assert allocate([50, 50, 50], 2) == [1, 1, 1]
    # Remainders: 7 of (5, 5, 5) is 2.33 each; one array gets the extra one.
    assert sorted(allocate([5, 5, 5], 7)) == [2, 2, 3]
    assert allocate([3, 4], 100) == [3, 4]


def test_stratified_draw_is_seeded_and_covers_every_array() -> None:
    lay = layout()
    picks = stratified(lay, 20, seed=4)
    assert np.array_equal(picks, stratified(lay, 20, seed=4))
    assert not np.array_equal(picks, stratified(lay, 20, seed=5))
    assert np.all(np.diff(picks) > 0)
    blocks = {lay.block_of(int(i)).prefix for i in picks}
    assert blocks == {b.prefix for b in lay.blocks}
    assert picks.size == sum(allocate([b.size for b in lay.blocks], 20))


def test_choose_reports_how() -> None:
    lay = layout()
    share = choose(lay, "10%", seed=1)
    assert share.kind == "share" and share.seed == 1
    assert share.describe().startswith(f"{share.count:,} of {lay.size:,} weights: a random 10% of each array")
    pattern = choose(lay, "L1.b[*]")
    assert pattern.kind == "pattern" and pattern.count == 11 and pattern.seed is None
    assert pattern.as_dict() == {"count": 11, "of": lay.size, "chosen": "pattern", "spec": "L1.b[*]",
                                 "seed": None}
    assert choose(lay, "100000").is_all and choose(lay, "100000").describe() == f"all {lay.size} weights"
    for spec, message in (("", "empty specification"), ("0", "at least 1"), ("L7.*", "no weight name matches")):
        with pytest.raises(ValueError, match=message):
            choose(lay, spec)


# -- through the command line ----------------------------------------------------------------------


def run(capsys: pytest.CaptureFixture[str], *argv: str) -> tuple[int, str, str]:
    code = main(["check", *argv])
    out, err = capsys.readouterr()
    return code, out, err


BUGGY = str(resolve_model("hive-gate-buggy"))


def test_a_share_still_finds_a_bug_in_a_small_array(capsys: pytest.CaptureFixture[str]) -> None:
    # The bundled buggy layer gets its three bias slopes wrong (README, "Custom layers"). 1% of the
    # 65 weights is one weight, but every array gives at least one: L2.b is among them.
    code, out, err = run(capsys, BUGGY, "--weights", "1%", "--json")
    assert code == 1 and err == ""
    doc = json.loads(out)
    assert doc["checked"] == {"count": 8, "of": 65, "chosen": "share", "spec": "1%", "seed": 0}
    names = [w["name"] for w in doc["weights"]]
    assert len(names) == 8 and {n.split("[")[0] for n in names} == {
        "L1.W", "L1.b", "L2.W", "L2.b", "L2.V", "L2.c", "L3.W", "L3.b"}
    assert [w["verdict"] for w in doc["weights"] if w["name"].startswith("L2.b")] == ["disagree"]
    assert sum(doc["counts"].values()) == 8


def test_a_pattern_checks_only_its_weights(capsys: pytest.CaptureFixture[str]) -> None:
    code, out, _ = run(capsys, BUGGY, "--weights", "L1.*")
    assert code == 0
    assert "checked 25 of 65 weights: the names matching L1.*\n" in out
    assert "verdicts    25 agree, 0 doubtful, 0 disagree, 0 kink, 0 unresolved (of the 25 checked)" in out
    assert "PASS: every slope agrees (of the 25 weights checked)" in out
    listed = [line.split()[0] for line in out.splitlines() if line.startswith("L")]
    assert listed[:25] == [f"L1.W[{i},{j}]" for i in range(4) for j in range(5)] + [f"L1.b[{j}]" for j in range(5)]
    code, out, _ = run(capsys, BUGGY, "--weights", "L2.b[*]")
    assert code == 1 and out.count("XX  disagree") == 3


def test_problems_only_lists_what_does_not_agree(capsys: pytest.CaptureFixture[str]) -> None:
    code, out, _ = run(capsys, BUGGY, "--problems-only", "--json")
    doc = json.loads(out)
    assert code == 1 and [w["name"] for w in doc["weights"]] == ["L2.b[0]", "L2.b[1]", "L2.b[2]"]
    assert doc["counts"]["agree"] == 62
    code, out, _ = run(capsys, BUGGY, "--problems-only")
    assert [line.split()[0] for line in out.splitlines() if line.startswith("L2.b")] == [
        "L2.b[0]", "L2.b[1]", "L2.b[2]"]
    assert "L1.W[0,0]" not in out


def test_seed_changes_the_draw(capsys: pytest.CaptureFixture[str]) -> None:
    drawn = []
    for seed in ("0", "0", "9"):
        _, out, _ = run(capsys, BUGGY, "--weights", "20", "--seed", seed, "--json")
        drawn.append([w["name"] for w in json.loads(out)["weights"]])
    assert drawn[0] == drawn[1] != drawn[2]


@pytest.mark.parametrize("argv,message", [
    (["--weights", "0%"], "--weights 0%: a share must be more than 0% and at most 100%"),
    (["--weights", "L9.*"], "--weights L9.*: no weight name matches it (names look like L1.W[0,0]; "
                            "* and ? are wildcards)"),
    (["--weights", "0"], "--weights 0: a count of weights must be at least 1"),
    (["--seed", "-1"], "--seed -1: a seed is a whole number, 0 or more"),
])
def test_bad_specification_is_one_line(capsys: pytest.CaptureFixture[str], argv: list[str], message: str) -> None:
    code, out, err = run(capsys, BUGGY, *argv)
    assert code == 2 and out == "" and err == f"stepper: {message}\n"


def test_names_of_a_large_model_are_not_built(monkeypatch: pytest.MonkeyPatch,
                                              write_model: Callable[..., Path],
                                              capsys: pytest.CaptureFixture[str]) -> None:
    # 10-300-1 (3,601 weights): a check of a share must not spell out every name.
    rng = np.random.default_rng(1)
    rows = "\n".join(",".join(f"{v:.4f}" for v in row) for row in rng.normal(size=(20, 11)))
    header = ",".join([f"x{i}" for i in range(10)] + ["y"])
    inputs = json.dumps([f"x{i}" for i in range(10)])
    path = write_model(f'loss = "mean_squared_error"\n[data]\nfile = "data.csv"\ninputs = {inputs}\n'
                       'targets = ["y"]\n[init]\nscheme = "glorot_uniform"\nseed = 1\n'
                       '[[layers]]\nunits = 300\nactivation = "tanh"\n[[layers]]\nunits = 1\n'
                       'activation = "identity"\n', header + "\n" + rows + "\n")
    from stepper.core import network

    def refuse(self: Any) -> Any:
        raise AssertionError("every name was built")

    monkeypatch.setattr(network.ParamLayout, "names", property(refuse))
    code, out, err = run(capsys, str(path), "--weights", "1%")
    assert code == 0 and err == "" and "checked 36 of 3,601 weights" in out
