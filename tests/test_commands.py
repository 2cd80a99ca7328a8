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


def test_wer_counted_in_small_batches_equals_jiwer_over_the_whole_file() -> None:
    # source: jiwer.process_words over every utterance at once (reference library);
    # corpus WER pools the counts, so summing them batch by batch must change nothing
    from rescore.nbest import read_nbest
    from rescore.text import tokens

    demo = FIXTURES / "demo" / "test.jsonl"
    utts = list(read_nbest(demo))
    refs = [" ".join(tokens(u["reference"])) for u in utts]
    hyps = [" ".join(tokens(u["hypotheses"][u.get("best", 0)]["text"])) for u in utts]
    keep = [i for i, r in enumerate(refs) if r]  # jiwer refuses an empty reference
    assert len(keep) == len(refs)
    expected = jiwer.process_words(refs, hyps)
    result = run(["wer", demo, "--json", "--batch-size", "7"])
    assert result.exit_code == 0, result.stderr
    data = json.loads(result.stdout)
    assert (data["substitutions"], data["deletions"], data["insertions"], data["hits"]) == (
        expected.substitutions, expected.deletions, expected.insertions, expected.hits)
    assert data["wer"] == pytest.approx(expected.wer)
    assert data["utterances"] == len(utts)


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


def test_apply_with_recognizer_weights_reproduces_its_choice(sample_dir: Path,
                                                             tmp_path: Path) -> None:
    # The sample README: LM weight 9.5 on first_pass_lm, filler_penalty weight 1 and a
    # word insertion penalty of -0.6296 nats reproduce the recognizer's first choice.
    weights = tmp_path / "recognizer.json"
    weights.write_text(json.dumps({"acoustic_scale": 1.0, "lm_weight": 0.0,
                                   "insertion_penalty": -0.6296,
                                   "features": {"first_pass_lm": 9.5, "filler_penalty": 1.0}}))
    for name in ("warehouse_flite.jsonl", "warehouse_espeak.jsonl"):
        out, tsv = tmp_path / f"{name}.out", tmp_path / f"{name}.tsv"
        result = run(["apply", sample_dir / name, "--weights", weights, "-o", out,
                      "--text", tsv])
        assert result.exit_code == 0, result.stderr
        records = [json.loads(line) for line in out.read_text().splitlines()]
        assert len(records) == 30 and all(r["best"] == 0 for r in records)
        assert all({"words", "total"} <= set(h) and "lm" not in h
                   for r in records for h in r["hypotheses"])
        first = [f"{r['id']}\t{r['hypotheses'][0]['text']}" for r in records]
        assert tsv.read_text().splitlines() == first


def test_apply_lm_weight_without_model_is_usage_error(tmp_path: Path) -> None:
    weights = tmp_path / "w.json"
    weights.write_text(json.dumps({"acoustic_scale": 1.0, "lm_weight": 0.5,
                                   "insertion_penalty": 0.0, "features": {}}))
    out = tmp_path / "out.jsonl"
    result = run(["apply", TWO, "--weights", weights, "-o", out])
    assert result.exit_code == 2
    assert "LM weight to lm but no such --lm was given" in result.stderr
    assert not out.exists()


def test_apply_malformed_input_leaves_no_output(tmp_path: Path) -> None:
    weights = tmp_path / "w.json"
    weights.write_text(json.dumps({"acoustic_scale": 1.0, "lm_weight": 0.0,
                                   "insertion_penalty": 0.0, "features": {}}))
    bad = tmp_path / "bad.jsonl"
    bad.write_text(TWO.read_text() + '{"id": "x", "hypotheses": [{"text": "a"}]}\n')
    out = tmp_path / "out.jsonl"
    result = run(["apply", bad, "--weights", weights, "-o", out, "--text", tmp_path / "t.tsv"])
    assert result.exit_code == 1
    assert result.stderr.startswith(f"error: {bad}:4: hypotheses[0].acoustic: ")
    assert sorted(p.name for p in tmp_path.iterdir()) == ["bad.jsonl", "w.json"]


def test_tune_then_apply_on_the_demo_scenario(tmp_path: Path) -> None:
    # tuned weights must beat the recognizer's own first choice on dev (the point of tuning)
    demo = FIXTURES / "demo"
    model = tmp_path / "logbook.lm"
    assert run(["lm", "build", demo / "train.txt", "--order", "3", "-o", model]).exit_code == 0
    weights = tmp_path / "w.json"
    result = run(["tune", demo / "dev.jsonl", "--lm", model, "-o", weights, "--json",
                  "--folds", "3"])
    assert result.exit_code == 0, result.stderr
    data = json.loads(result.stdout)
    assert {"lm_weight", "insertion_penalty", "features", "dev_errors", "dev_wer",
            "baseline_wer", "oracle_wer", "search"} <= set(data)
    assert data["oracle_wer"] <= data["dev_wer"] < data["baseline_wer"]
    out = tmp_path / "test.out.jsonl"
    assert run(["apply", demo / "test.jsonl", "--lm", model, "--weights", weights,
                "-o", out]).exit_code == 0
    after = json.loads(run(["wer", out, "--json"]).stdout)["wer"]
    before = json.loads(run(["wer", demo / "test.jsonl", "--json"]).stdout)["wer"]
    assert after < before


def test_verbose_logs_to_stderr_only(tmp_path: Path) -> None:
    import logging

    weights = tmp_path / "w.json"
    weights.write_text(json.dumps({"acoustic_scale": 1.0, "lm_weight": 0.0,
                                   "insertion_penalty": 0.0, "features": {}}))
    try:
        result = run(["--verbose", "apply", TWO, "--weights", weights, "-o", tmp_path / "o"])
    finally:
        root = logging.getLogger()
        for handler in list(root.handlers):
            root.removeHandler(handler)
    assert result.exit_code == 0
    assert result.stdout == ""
    assert "rescore.pipeline: rescored lines 1-3 (2 utterances so far)" in result.stderr
