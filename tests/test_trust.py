"""What keeps a user from a wrong answer unnoticed: the weights' model, the score
convention, undefined WER, and the small print of check and apply (through the command)."""

from __future__ import annotations

import hashlib
import json
from pathlib import Path

import pytest

from tests.conftest import FIXTURES, run

TWO = FIXTURES / "nbest_two_utterances.jsonl"
TRAIN = FIXTURES / "demo" / "train.txt"


@pytest.fixture(scope="module")
def models(tmp_path_factory: pytest.TempPathFactory) -> dict[str, Path]:
    folder = tmp_path_factory.mktemp("trust")
    out = {"a": folder / "a.lm", "b": folder / "b.lm"}
    assert run(["lm", "build", TRAIN, "--order", "3", "-o", out["a"]]).exit_code == 0
    assert run(["lm", "build", TRAIN, "--order", "2", "-o", out["b"]]).exit_code == 0
    weights = folder / "w.json"
    tuned = run(["tune", TWO, "--lm", out["a"], "-o", weights, "--folds", "0"])
    assert tuned.exit_code == 0, tuned.stderr
    out["weights"] = weights
    return out


def _sha(path: Path) -> str:
    # source: hashlib.sha256 (Python standard library), the digest the provenance records
    return hashlib.sha256(path.read_bytes()).hexdigest()


# ------------------------------------------------------------- the weights know their model


def test_apply_refuses_another_model_naming_both_hashes(models: dict[str, Path],
                                                        tmp_path: Path) -> None:
    out = tmp_path / "out.jsonl"
    result = run(["apply", TWO, "--lm", models["b"], "--weights", models["weights"],
                  "-o", out])
    assert result.exit_code == 1
    line = result.stderr.strip()
    assert line.startswith(f"error: {models['weights']}: provenance.models.lm.sha256: ")
    assert _sha(models["a"]) in line and _sha(models["b"]) in line
    assert "--allow-other-model" in line and len(line.splitlines()) == 1
    assert not out.exists()


def test_apply_allow_other_model_goes_on_with_a_warning(models: dict[str, Path],
                                                        tmp_path: Path) -> None:
    out = tmp_path / "out.jsonl"
    result = run(["apply", TWO, "--lm", models["b"], "--weights", models["weights"],
                  "-o", out, "--allow-other-model"])
    assert result.exit_code == 0, result.stderr
    warning = [ln for ln in result.stderr.splitlines() if ln.startswith("warning:")]
    assert len(warning) == 1 and _sha(models["b"]) in warning[0] \
        and _sha(models["a"]) in warning[0] and "--allow-other-model" in warning[0]
    assert out.exists()


def test_apply_with_the_tuned_model_says_nothing_of_models(models: dict[str, Path],
                                                           tmp_path: Path) -> None:
    result = run(["apply", TWO, "--lm", models["a"], "--weights", models["weights"],
                  "-o", tmp_path / "out.jsonl"])
    assert result.exit_code == 0, result.stderr
    assert "warning" not in result.stderr


def test_check_models_library_function_for_the_report(models: dict[str, Path]) -> None:
    # the function `report --weights` can call: same rule, data instead of printing
    from rescore import pipeline
    from rescore.errors import InputError

    given = pipeline.load_lms([str(models["b"])])
    with pytest.raises(InputError, match="SHA-256"):
        pipeline.check_models(models["weights"], given)
    (other,) = pipeline.check_models(models["weights"], given, allow_other=True)
    assert other.to_dict() == {"name": "lm", "path": str(models["b"]),
                               "sha256": _sha(models["b"]), "tuned_sha256": _sha(models["a"])}
    assert pipeline.check_models(models["weights"], pipeline.load_lms([str(models["a"])])) == ()


# ------------------------------------------------------------- score convention


def _lists(path: Path, n: int, *, costs: bool) -> Path:
    """``n`` two-hypothesis lists, best first; as costs (positive, lower better) or as
    log-likelihoods (negative, higher better)."""
    lines = []
    for u in range(n):
        good, bad = (100.0 + u, 120.0 + u) if costs else (-100.0 - u, -120.0 - u)
        lines.append(json.dumps({"id": f"u{u}", "reference": "row two",
                                 "hypotheses": [{"text": "row two", "acoustic": good},
                                                {"text": "grow two", "acoustic": bad}]}))
    path.write_text("\n".join(lines) + "\n")
    return path


def test_costs_read_as_log_likelihoods_are_warned_about(tmp_path: Path) -> None:
    # 12 lists of costs read without --costs: every score positive (24 of 24, above the
    # documented 95 %) and every list's scores growing down it (12 of 12 lists, above
    # half, with at least 10 lists): both warnings, in check, tune and apply
    nbest = _lists(tmp_path / "costs.jsonl", 12, costs=True)
    checked = run(["check", nbest, "--json"])
    assert checked.exit_code == 0, checked.stderr
    data = json.loads(checked.stdout)
    assert data["positive_acoustic"] == 24 and data["lists_out_of_order"] == 12
    assert len(data["warnings"]) == 2 and "24 of 24 acoustic scores" in data["warnings"][0]
    assert "--costs" in data["warnings"][0] and "12 of 12 lists" in data["warnings"][1]
    assert checked.stderr.count("warning:") == 2
    tuned = run(["tune", nbest, "-o", tmp_path / "w.json", "--folds", "0", "--json"])
    assert tuned.exit_code == 0, tuned.stderr
    assert json.loads(tuned.stdout)["warnings"] == data["warnings"]
    assert tuned.stderr.count("warning: ") >= 2
    applied = run(["apply", nbest, "--weights", tmp_path / "w.json", "-o",
                   tmp_path / "out.jsonl"])
    assert applied.exit_code == 0, applied.stderr
    assert "24 of 24 acoustic scores" in applied.stderr


def test_the_same_costs_read_with_costs_are_quiet(tmp_path: Path) -> None:
    nbest = _lists(tmp_path / "costs.jsonl", 12, costs=True)
    data = json.loads(run(["check", nbest, "--costs", "--json"]).stdout)
    # negated on reading: all negative, best first, so nothing to warn about
    assert data["positive_acoustic"] == 0 and data["lists_out_of_order"] == 0
    assert data["warnings"] == []
    plain = json.loads(run(["check", _lists(tmp_path / "ll.jsonl", 12, costs=False),
                            "--json"]).stdout)
    assert plain["warnings"] == []


def test_order_warning_needs_ten_lists(tmp_path: Path) -> None:
    # 9 lists ordered against their scores: below the documented minimum of 10, so only
    # the sign warning remains
    data = json.loads(run(["check", _lists(tmp_path / "c.jsonl", 9, costs=True),
                           "--json"]).stdout)
    assert data["lists_out_of_order"] == 9 and len(data["warnings"]) == 1


def test_recognizer_sample_gives_no_convention_warning(sample_dir: Path) -> None:
    # real recognizer lists (natural-log likelihoods, sorted by the recognizer's total):
    # no warning may fire on them (README of the sample: log-likelihoods, best first)
    for name in ("warehouse_espeak.jsonl", "warehouse_flite.jsonl"):
        data = json.loads(run(["check", sample_dir / name, "--json"]).stdout)
        assert data["warnings"] == [], name
        assert data["lists_out_of_order"] < data["utterances"] / 2


# ------------------------------------------------------------- undefined WER


def test_wer_with_no_reference_words_is_one_error_everywhere(tmp_path: Path) -> None:
    # the case: references without words and a hypothesis with words; errors over
    # zero reference words is undefined, so every command refuses it the same way
    refs, hyps = tmp_path / "r.tsv", tmp_path / "h.tsv"
    refs.write_text("a\t\n")
    hyps.write_text("a\tpump on\n")
    for args in (["wer", "--refs", refs, "--hyps", hyps, "--json"],
                 ["wer", "--refs", refs, "--hyps", hyps]):
        result = run(args)
        assert result.exit_code == 1
        assert result.stderr == f"error: {refs}: the references hold no words; WER is " \
            "undefined\n"
        assert result.stdout == ""
    nbest = tmp_path / "n.jsonl"
    nbest.write_text(json.dumps({"id": "a", "reference": "",
                                 "hypotheses": [{"text": "pump on", "acoustic": -1.0}]}) + "\n")
    for args in (["wer", nbest, "--json"], ["check", nbest, "--json"], ["check", nbest],
                 ["tune", nbest, "-o", tmp_path / "w.json"]):
        result = run(args)
        assert result.exit_code == 1, args
        assert "the references hold no words; WER is undefined" in result.stderr, args
        assert result.stderr.startswith(f"error: {nbest}") or args[0] == "tune", args


def test_check_without_references_still_passes(tmp_path: Path) -> None:
    nbest = tmp_path / "n.jsonl"
    nbest.write_text(json.dumps({"id": "a",
                                 "hypotheses": [{"text": "pump on", "acoustic": -1.0}]}) + "\n")
    data = json.loads(run(["check", nbest, "--json"]).stdout)
    assert data["one_best_wer"] is None and data["oracle_wer"] is None


# ------------------------------------------------------------- small print


def test_check_counts_empty_duplicate_and_out_of_order_hypotheses(tmp_path: Path) -> None:
    # hand-counted: list 1 has "Row two." and "row two" (one duplicate after
    # normalisation: lowercase, punctuation dropped) and "" (empty); list 2 has "..."
    # (empty after normalisation) and its scores grow down the list (-5 then -3: out of
    # order); list 3 is one hypothesis (no order to judge)
    nbest = tmp_path / "n.jsonl"
    recs = [
        {"id": "a", "hypotheses": [{"text": "Row two.", "acoustic": -1.0},
                                   {"text": "row two", "acoustic": -2.0},
                                   {"text": "", "acoustic": -3.0}]},
        {"id": "b", "hypotheses": [{"text": "vent", "acoustic": -5.0},
                                   {"text": "...", "acoustic": -3.0}]},
        {"id": "c", "hypotheses": [{"text": "lamp", "acoustic": -1.0}]},
    ]
    nbest.write_text("".join(json.dumps(r) + "\n" for r in recs))
    result = run(["check", nbest, "--json"])
    assert result.exit_code == 0, result.stderr
    data = json.loads(result.stdout)
    assert (data["empty_hypotheses"], data["duplicate_hypotheses"],
            data["lists_out_of_order"]) == (2, 1, 1)
    table = run(["check", nbest]).stdout
    assert "empty hypotheses" in table and "duplicates (after normalisation)" in table
    assert "lists ordered against their scores" in table


def test_apply_counts_changed_and_empty_choices(tmp_path: Path) -> None:
    # weights with a large positive penalty per word favour the longest hypothesis and a
    # large negative one the shortest: hand-worked on these lists, total = acoustic +
    # penalty * words
    nbest = tmp_path / "n.jsonl"
    recs = [
        {"id": "a", "hypotheses": [{"text": "row two", "acoustic": -1.0},
                                   {"text": "", "acoustic": -2.0}]},
        {"id": "b", "hypotheses": [{"text": "vent", "acoustic": -1.0},
                                   {"text": "vent bay", "acoustic": -2.0}]},
    ]
    nbest.write_text("".join(json.dumps(r) + "\n" for r in recs))
    weights = tmp_path / "w.json"
    for penalty, changed, empty in ((-10.0, 1, 1), (10.0, 1, 0), (0.0, 0, 0)):
        # -10: a: -21 vs -2 -> "" (changed, empty); b: -11 vs -22 -> "vent" (unchanged)
        # +10: a: 19 vs -2 -> "row two"; b: 9 vs 18 -> "vent bay" (changed)
        # 0: the acoustic scores alone: both first hypotheses
        weights.write_text(json.dumps({"acoustic_scale": 1.0, "lm_weight": 0.0,
                                       "insertion_penalty": penalty, "features": {}}))
        result = run(["apply", nbest, "--weights", weights, "-o", tmp_path / "o.jsonl"])
        assert result.exit_code == 0, result.stderr
        assert f"({changed} changed 1-best, {empty} chose an empty hypothesis)" \
            in result.stderr, penalty


def test_parallel_apply_pools_the_counts_of_its_shards(tmp_path: Path) -> None:
    # the same file in one process and in shards: the same summary and warnings (the
    # counts are sums over utterances, so splitting the file cannot change them)
    nbest = _lists(tmp_path / "costs.jsonl", 40, costs=True)
    weights = tmp_path / "w.json"
    weights.write_text(json.dumps({"acoustic_scale": 1.0, "lm_weight": 0.0,
                                   "insertion_penalty": 0.0, "features": {}}))
    one = run(["apply", nbest, "--weights", weights, "-o", tmp_path / "a.jsonl"])
    many = run(["apply", nbest, "--weights", weights, "-o", tmp_path / "b.jsonl",
                "--workers", "2", "--shard-mb", "0.001"])
    assert one.exit_code == 0 and many.exit_code == 0, many.stderr
    # derived: 40 lists of two costs read as log-likelihoods: 80 of 80 scores positive,
    # the second hypothesis (higher as read) chosen in all 40
    assert "80 of 80 acoustic scores" in one.stderr and "40 of 40 lists" in one.stderr
    assert "(40 changed 1-best, 0 chose an empty hypothesis)" in one.stderr
    warnings = [ln for ln in many.stderr.splitlines() if ln.startswith("warning:")]
    assert warnings == [ln for ln in one.stderr.splitlines() if ln.startswith("warning:")]
    assert "(40 changed 1-best, 0 chose an empty hypothesis)" in many.stderr
    assert " shards " in many.stderr
