"""``rescore combine`` on the demo scenario: two simulated recognizers with independent
errors (scripts/make_combine_data.py), each tuned and applied on its own, against their
merged lists tuned and applied the same way.

System combination by aligning several systems' outputs and voting is Fiscus 1997 (the
recognizer output voting method); ours is our own implementation of the idea: one merged
list per utterance with one score per system, the system weights tuned on dev like any
other feature, and ``--choose consensus`` voting over one confusion network. The premise
checked here is that method's: when two systems' errors are independent, a word both
systems agree on is rarely wrong, so the combination makes fewer errors than either.
"""

from __future__ import annotations

import json
from pathlib import Path
from types import ModuleType

import jiwer
import pytest

from rescore.decode.choice import RULES
from rescore.demo import BUNDLED
from rescore.text import normalise
from tests.conftest import load_script, run

SCRIPT = Path(__file__).resolve().parent.parent / "scripts" / "make_combine_data.py"
SYSTEMS = ("A", "B")
COMBINED = "A+B"
# the features each list gives: a system's own first pass, or the merged list's per-system
# scores (acoustic:S, first_pass_lm:S, missing:S; the names combine gives them)
FEATURES = {
    "A": ["first_pass_lm"], "B": ["first_pass_lm"],
    COMBINED: [f"{name}:{s}" for s in SYSTEMS
               for name in ("acoustic", "first_pass_lm", "missing")],
}


def _load_script() -> ModuleType:
    return load_script(SCRIPT)


def _ok(args: list[str | Path]) -> None:
    result = run(args)
    assert result.exit_code == 0, result.output


def _references(path: Path) -> dict[str, str]:
    with open(path, encoding="utf-8") as fh:
        return {r["id"]: r["reference"] for r in map(json.loads, fh)}


def _wer(refs: dict[str, str], tsv: Path) -> float:
    """Corpus WER of an ``id<TAB>text`` file measured by jiwer (an outside scorer)."""
    hyps = dict(line.split("\t", 1) for line in tsv.read_text().splitlines())
    assert set(hyps) == set(refs)
    ids = sorted(refs)
    return float(jiwer.wer([normalise(refs[i]) for i in ids],
                           [normalise(hyps[i]) for i in ids]))


@pytest.fixture(scope="module")
def test_wers(tmp_path_factory: pytest.TempPathFactory) -> dict[str, dict[str, float]]:
    """Test WER of each system and of the combination under each choice rule."""
    if not (BUNDLED / "train.txt").is_file():
        pytest.skip("bundled demo data lacks train.txt")
    tmp = tmp_path_factory.mktemp("combine")
    _load_script().generate(tmp)
    model = tmp / "logbook.lm"
    _ok(["lm", "build", BUNDLED / "train.txt", "--order", "3", "-o", model])
    files = {s: {split: tmp / f"{split}.{s}.jsonl" for split in ("dev", "test")}
             for s in SYSTEMS}
    files[COMBINED] = {split: tmp / f"{split}.AB.jsonl" for split in ("dev", "test")}
    for split in ("dev", "test"):
        _ok(["combine", *(f"{s}={files[s][split]}" for s in SYSTEMS),
             "-o", files[COMBINED][split]])
    refs = _references(files["A"]["test"])
    assert _references(files["B"]["test"]) == refs
    out: dict[str, dict[str, float]] = {}
    for system, paths in files.items():
        weights = tmp / f"weights.{system}.json"
        # every system the same way: exact search over LM weight, penalty and its features
        _ok(["tune", paths["dev"], "--lm", model, "-o", weights, "--search", "exact",
             "--folds", "0", *(a for f in FEATURES[system] for a in ("--feature", f))])
        out[system] = {}
        for rule in RULES:
            text = tmp / f"test.{system}.{rule}.tsv"
            _ok(["apply", paths["test"], "--lm", model, "--weights", weights,
                 "-o", tmp / f"out.{system}.{rule}.jsonl", "--text", text,
                 "--choose", rule])
            out[system][rule] = _wer(refs, text)
    return out


@pytest.mark.slow
def test_combination_beats_each_system_on_test(test_wers: dict[str, dict[str, float]],
                                               capsys: pytest.CaptureFixture[str]) -> None:
    with capsys.disabled():
        print("\ntest WER (jiwer) of each system and of the combination, tuned on dev:")
        print(f"{'system':<8}" + "".join(f"{rule:>11}" for rule in RULES))
        for system, wers in test_wers.items():
            print(f"{system:<8}" + "".join(f"{wers[rule]:>11.2%}" for rule in RULES))
    for rule in RULES:
        combined = test_wers[COMBINED][rule]
        for system in SYSTEMS:
            assert combined < test_wers[system][rule], (rule, system, test_wers)


def test_simulated_systems_are_seeded_and_follow_the_demo_references(tmp_path: Path) -> None:
    # the generator's contract: seeded (same seed, same bytes), the demo's ids and
    # references, and for a given utterance the two systems' lists drawn independently
    # (their first hypotheses are not the same list of texts)
    script = _load_script()
    script.generate(tmp_path / "one", limit=40)
    script.generate(tmp_path / "two", limit=40)
    for name in ("dev.A.jsonl", "dev.B.jsonl", "test.A.jsonl", "test.B.jsonl"):
        assert (tmp_path / "one" / name).read_bytes() == (tmp_path / "two" / name).read_bytes()
    demo = list(_references(BUNDLED / "test.jsonl").items())[:40]
    for system in SYSTEMS:
        assert list(_references(tmp_path / "one" / f"test.{system}.jsonl").items()) == demo

    def firsts(system: str) -> list[str]:
        with open(tmp_path / "one" / f"test.{system}.jsonl", encoding="utf-8") as fh:
            return [json.loads(line)["hypotheses"][0]["text"] for line in fh]

    assert firsts("A") != firsts("B")
