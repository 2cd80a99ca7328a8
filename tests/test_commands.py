"""Command-line behaviour of the foundation commands: exit codes, stdout, stderr."""

from __future__ import annotations

import json
from pathlib import Path

import jiwer
import pytest

from tests.conftest import FIXTURES, run

TWO = FIXTURES / "nbest_two_utterances.jsonl"

# Jurafsky and Martin, Speech and Language Processing, 3rd ed. draft, speech recognition
# chapter, WER example: 13 reference words, 6 substitutions, 1 deletion, 3 insertions.
JM_REF = "i um the phone is i left the portable phone upstairs last night"
JM_HYP = "i got it to the fullest i love to portable form of stores last night"


def test_wer_textbook_example_through_the_command(tmp_path: Path) -> None:
    refs, hyps = tmp_path / "refs.tsv", tmp_path / "hyps.tsv"
    refs.write_text(f"jm-1\t{JM_REF}\n")
    hyps.write_text(f"jm-1\t{JM_HYP}\n")
    result = run(["wer", "--refs", refs, "--hyps", hyps, "--json"])
    assert result.exit_code == 0, result.stderr
    data = json.loads(result.stdout)
    assert data == {"wer": pytest.approx(10 / 13), "substitutions": 6, "deletions": 1,
                    "insertions": 3, "hits": 6, "reference_words": 13, "utterances": 1}


def test_wer_of_nbest_one_best_equals_jiwer() -> None:
    # jiwer is the reference implementation; corpus WER pools errors over all words
    result = run(["wer", TWO, "--json"])
    assert result.exit_code == 0, result.stderr
    refs = ["vent bay three opened to forty percent", "lamp bank four dimmed"]
    hyps = ["went bay three opened to forty percent", "lamp bank for dimmed"]
    assert json.loads(result.stdout)["wer"] == pytest.approx(jiwer.wer(refs, hyps))


def test_wer_table_is_printed() -> None:
    result = run(["wer", TWO])
    assert result.exit_code == 0
    assert "18.18%" in result.stdout  # 2 errors over 11 reference words


def test_wer_transcripts_missing_ids(tmp_path: Path) -> None:
    hyps = tmp_path / "hyps.tsv"
    hyps.write_text("lark-0001\tvent bay three\n")
    result = run(["wer", "--refs", FIXTURES / "refs_two_utterances.tsv", "--hyps", hyps])
    assert result.exit_code == 1
    assert "2 references for 1 transcripts; missing ids: lark-0002" in result.stderr


def test_wer_usage_error_exit_2() -> None:
    result = run(["wer"])
    assert result.exit_code == 2
    assert result.stderr.startswith("error: give either an N-best file")


def test_check_json_counts_and_oracle() -> None:
    result = run(["check", TWO, "--json"])
    assert result.exit_code == 0, result.stderr
    data = json.loads(result.stdout)
    # first hypotheses: 1 + 1 errors; best in list: 0 + 0; 11 reference words
    assert data["utterances"] == 2 and data["hypotheses"] == 5 and data["max_depth"] == 3
    assert data["one_best_wer"] == pytest.approx(2 / 11)
    assert data["oracle_wer"] == 0.0
    assert data["depths"] == {"2": 1, "3": 1}


def test_check_without_references_gives_null_wers() -> None:
    data = json.loads(run(["check", FIXTURES / "nbest_log10_costs.jsonl", "--json"]).stdout)
    assert data["one_best_wer"] is None and data["oracle_wer"] is None


def test_check_real_recognizer_sample_matches_its_readme(sample_dir: Path) -> None:
    # The sample README states: flite 1-best WER 0.174, oracle 0.091; espeak 0.523, 0.345.
    for name, one_best, oracle in (("warehouse_flite.jsonl", 0.174, 0.091),
                                   ("warehouse_espeak.jsonl", 0.523, 0.345)):
        data = json.loads(run(["check", sample_dir / name, "--json"]).stdout)
        assert data["one_best_wer"] == pytest.approx(one_best, abs=5e-4)
        assert data["oracle_wer"] == pytest.approx(oracle, abs=5e-4)
