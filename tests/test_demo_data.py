"""Checks of the bundled demo data (fixtures/demo) and of scripts/make_demo_data.py.

The WER figures here are measured with jiwer, an outside implementation, not with the
project's own scorer. The ranges are the targets the simulation was built for; they are
broad on purpose (the data is random), but each one would catch a simulation that drifted
into being too easy, too hard, or leaking the truth.
"""

from __future__ import annotations

import itertools
import json
import math
import os
import statistics
import subprocess
import sys
from collections import Counter
from collections.abc import Sequence
from pathlib import Path
from types import ModuleType
from typing import Any

import jiwer
import pytest

from rescore.text import normalise
from tests.conftest import load_script

ROOT = Path(__file__).resolve().parent.parent
SCRIPT = ROOT / "scripts" / "make_demo_data.py"
DEMO = ROOT / "fixtures" / "demo"
FILES = ("train.txt", "dev.txt", "background.txt", "dev.jsonl", "test.jsonl", "README.md")
MAX_BYTES = 5 * 1024 * 1024
# Float slack when re-adding two 2-decimal scores.
SCORE_TOLERANCE = 1e-6


def _load_script() -> ModuleType:
    return load_script(SCRIPT)


@pytest.fixture(scope="module")
def script() -> ModuleType:
    return _load_script()


def _records(name: str) -> list[dict[str, Any]]:
    with open(DEMO / name, encoding="utf-8") as fh:
        return [json.loads(line) for line in fh if line.strip()]


def _lines(name: str) -> list[str]:
    return (DEMO / name).read_text(encoding="utf-8").splitlines()


@pytest.fixture(scope="module")
def dev() -> list[dict[str, Any]]:
    return _records("dev.jsonl")


@pytest.fixture(scope="module")
def test_set() -> list[dict[str, Any]]:
    return _records("test.jsonl")


def _run_script(out: Path, seed: int, hash_seed: str, *extra: str) -> None:
    # A separate process per run, with a different string-hash seed each time, so that any
    # dependence on set or dict iteration order would show up as a difference.
    env = dict(os.environ, PYTHONHASHSEED=hash_seed, PYTHONPATH=str(ROOT))
    subprocess.run(
        [sys.executable, str(SCRIPT), "--out", str(out), "--seed", str(seed), *extra],
        check=True, env=env, capture_output=True,
    )


# ---------------------------------------------------------------------------------------
# The script


def test_script_same_seed_gives_identical_files(tmp_path: Path) -> None:
    _run_script(tmp_path / "a", 7, "1", "--small")
    _run_script(tmp_path / "b", 7, "2", "--small")
    for name in FILES:
        assert (tmp_path / "a" / name).read_bytes() == (tmp_path / "b" / name).read_bytes(), name


def test_script_other_seed_gives_other_lists(tmp_path: Path) -> None:
    _run_script(tmp_path / "a", 7, "0", "--small")
    _run_script(tmp_path / "b", 8, "0", "--small")
    first, second = (tmp_path / d / "test.jsonl" for d in ("a", "b"))
    assert first.read_bytes() != second.read_bytes()


def test_script_reproduces_committed_fixtures(tmp_path: Path, script: ModuleType) -> None:
    script.generate(tmp_path, script.DEFAULT_SEED)
    for name in FILES:
        assert (tmp_path / name).read_bytes() == (DEMO / name).read_bytes(), name


# ---------------------------------------------------------------------------------------
# The committed files against the contract


def test_fixtures_total_size_under_limit() -> None:
    total = sum(p.stat().st_size for p in DEMO.iterdir() if p.is_file())
    assert total < MAX_BYTES


@pytest.mark.parametrize("name, split", [("dev.jsonl", "dev"), ("test.jsonl", "test")])
def test_nbest_records_follow_contract(name: str, split: str) -> None:
    records = _records(name)
    assert len(records) >= 400
    ids = [r["id"] for r in records]
    assert len(set(ids)) == len(ids)
    for number, record in enumerate(records, start=1):
        # CONTRACT.md: keys id, reference, hypotheses, meta; any other key is an error.
        assert set(record) == {"id", "reference", "hypotheses", "meta"}
        assert record["id"] == f"lark-{split}-{number:04d}"
        assert isinstance(record["reference"], str) and record["reference"]
        assert normalise(record["reference"]) == record["reference"]
        assert set(record["meta"]) == {"speaker", "shift"}
        hyps = record["hypotheses"]
        assert 1 <= len(hyps) <= 20
        assert len({h["text"] for h in hyps}) == len(hyps), "duplicate hypothesis text"
        for hyp in hyps:
            assert set(hyp) <= {"text", "acoustic", "features"} and {"text", "acoustic"} <= set(hyp)
            assert normalise(hyp["text"]) == hyp["text"]
            assert isinstance(hyp["acoustic"], float) and math.isfinite(hyp["acoustic"])
            assert hyp["acoustic"] < 0
            assert set(hyp.get("features", {})) <= {"first_pass_lm"}
            assert all(math.isfinite(v) for v in hyp.get("features", {}).values())


def test_nbest_depths_vary() -> None:
    depths = Counter(len(r["hypotheses"]) for name in ("dev.jsonl", "test.jsonl")
                     for r in _records(name))
    assert depths[20] > 0 and sum(n for d, n in depths.items() if d < 20) > 0


def test_acoustic_scale_per_word(test_set: list[dict[str, Any]]) -> None:
    # Design of the simulation: -20 to -40 nats a spoken word plus a per-utterance offset
    # of up to -60 nats, so short utterances may fall a little below -40 a word.
    per_word = [r["hypotheses"][0]["acoustic"] / len(r["reference"].split()) for r in test_set]
    assert -40.0 < statistics.median(per_word) < -25.0
    assert all(-70.0 < v < -15.0 for v in per_word)


def test_text_files_sizes_and_normalisation() -> None:
    counts = {name: len(_lines(name)) for name in ("train.txt", "dev.txt", "background.txt")}
    assert 3000 <= counts["train.txt"] <= 20000
    assert 200 <= counts["dev.txt"] <= 1000
    assert 10000 <= counts["background.txt"] <= 30000
    for name in counts:
        for line in _lines(name):
            assert line and normalise(line) == line


def test_references_held_out_from_text(dev: list[dict[str, Any]],
                                       test_set: list[dict[str, Any]]) -> None:
    train, dev_text = set(_lines("train.txt")), set(_lines("dev.txt"))
    dev_refs, test_refs = {r["reference"] for r in dev}, {r["reference"] for r in test_set}
    assert not (dev_refs | test_refs) & (train | dev_text)
    assert not dev_refs & test_refs
    assert not dev_text & train


def test_background_shares_words_not_phrasing() -> None:
    background = _lines("background.txt")
    train = _lines("train.txt")
    shared = {w for s in background for w in s.split()} & {w for s in train for w in s.split()}
    assert {"the", "to", "at", "in", "three", "four"} <= shared

    def trigrams(lines: Sequence[str]) -> set[tuple[str, ...]]:
        return {tuple(ws[i:i + 3]) for s in lines for ws in [s.split()] for i in range(len(ws) - 2)}

    # Design of the scenario: the general text is mostly its own phrasing (under 15 % of its
    # word triples occur in the logbook), yet shares some (numbers, times, bays, rows), so a
    # general model has something to add to a small in-domain one.
    bg, tr = trigrams(background), trigrams(train)
    assert 0.01 * len(bg) < len(bg & tr) < 0.15 * len(bg)


def test_hypotheses_ordered_by_first_pass_score(script: ModuleType,
                                                dev: list[dict[str, Any]],
                                                test_set: list[dict[str, Any]]) -> None:
    # Order comes from the two published scores only (README: acoustic + w * first_pass_lm).
    w = script.FIRST_PASS_WEIGHT
    for record in dev + test_set:
        totals = [h["acoustic"] + w * h["features"]["first_pass_lm"] for h in record["hypotheses"]]
        assert all(a >= b - SCORE_TOLERANCE for a, b in itertools.pairwise(totals))


# ---------------------------------------------------------------------------------------
# The simulation against its targets, measured with jiwer


def _errors(ref: str, hyp: str) -> int:
    out = jiwer.process_words(ref, hyp)
    return int(out.substitutions + out.deletions + out.insertions)


def _wer(records: Sequence[dict[str, Any]], picks: Sequence[str]) -> float:
    return float(jiwer.wer([r["reference"] for r in records], list(picks)))


def _first(records: Sequence[dict[str, Any]]) -> list[str]:
    return [r["hypotheses"][0]["text"] for r in records]


def _acoustic_only(records: Sequence[dict[str, Any]]) -> list[str]:
    return [max(r["hypotheses"], key=lambda h: h["acoustic"])["text"] for r in records]


def _oracle(records: Sequence[dict[str, Any]]) -> list[str]:
    return [min((h["text"] for h in r["hypotheses"]), key=lambda t: _errors(r["reference"], t))
            for r in records]


@pytest.mark.parametrize("name", ["dev.jsonl", "test.jsonl"])
def test_simulated_wer_in_target_ranges(name: str) -> None:
    records = _records(name)
    first = _wer(records, _first(records))
    oracle = _wer(records, _oracle(records))
    # Targets of the simulation: first-hypothesis WER about 15-25 %, oracle 5-10 %;
    # ranges widened a little for sampling noise.
    assert 0.13 <= first <= 0.27
    assert 0.03 <= oracle <= 0.11
    assert oracle < 0.5 * first


@pytest.mark.parametrize("name", ["dev.jsonl", "test.jsonl"])
def test_truth_sometimes_absent_and_not_favoured(name: str) -> None:
    records = _records(name)
    absent = sum(r["reference"] not in {h["text"] for h in r["hypotheses"]} for r in records)
    assert 0.08 <= absent / len(records) <= 0.25
    # The truth must not sit first far more often than the acoustics make it best.
    first_true = sum(r["hypotheses"][0]["text"] == r["reference"] for r in records)
    acoustic_true = sum(t == r["reference"] for t, r in zip(_acoustic_only(records), records,
                                                            strict=True))
    assert first_true <= 1.5 * acoustic_true


class AddOneBigram:
    """Plain add-one (Laplace) bigram over words with <s> and </s>, natural log."""

    def __init__(self, sentences: Sequence[str]):
        self.history: Counter[str] = Counter()
        self.pairs: Counter[tuple[str, str]] = Counter()
        vocab: set[str] = set()
        for sentence in sentences:
            words = ["<s>", *sentence.split(), "</s>"]
            vocab.update(words)
            self.history.update(words[:-1])
            self.pairs.update(itertools.pairwise(words))
        self.v = len(vocab) + 1  # one slot for every unseen word

    def logprob(self, text: str) -> float:
        words = ["<s>", *text.split(), "</s>"]
        return sum(math.log((self.pairs[(a, b)] + 1) / (self.history[a] + self.v))
                   for a, b in itertools.pairwise(words))


def _rescore(records: Sequence[dict[str, Any]], lm: AddOneBigram, w: float) -> list[str]:
    return [max(r["hypotheses"], key=lambda h: h["acoustic"] + w * lm.logprob(h["text"]))["text"]
            for r in records]


def test_in_domain_bigram_earns_the_fall(dev: list[dict[str, Any]],
                                         test_set: list[dict[str, Any]]) -> None:
    lm = AddOneBigram(_lines("train.txt"))
    baseline = _wer(dev, _first(dev))
    grid = (0.25, 0.5, 1.0, 2.0, 4.0)
    wers = {w: _wer(dev, _rescore(dev, lm, w)) for w in grid}
    best_w = min(grid, key=lambda w: wers[w])
    # The fall must be large, at least a quarter of the baseline, not a rounding effect.
    assert wers[best_w] < 0.75 * baseline
    # Acoustics alone do not earn it: the acoustic best is no better than the first pass.
    assert _wer(dev, _acoustic_only(dev)) > 0.9 * baseline
    # The weight chosen on dev carries over to the test set.
    assert _wer(test_set, _rescore(test_set, lm, best_w)) < 0.75 * _wer(test_set, _first(test_set))
