"""apply --choose, the decoding keys of the weights file, tune's decoding fit and combine,
on hand-made lists whose answers are worked out in the comments."""

from __future__ import annotations

import json
import math
from pathlib import Path

import numpy as np
import pytest

from rescore.decode.fit import DevTexts, fit_decoding
from rescore.scoring import FeatureMatrix
from rescore.weights import Weights, read_weights, weights_text
from tests.conftest import run

# One list, scores chosen so the posteriors at scale 1 are exactly 0.4, 0.3, 0.3:
#   A "a b c" (p 0.4), B "a x d" (p 0.3), C "a x c" (p 0.3).
# Word edit distances (hand-counted): A-B 2 (b->x, c->d), A-C 1 (b->x), B-C 1 (d->c).
# Expected word errors (Stolcke, Konig and Weintraub 1997: sum_g p(g) d(h, g)):
#   A: 0.3*2 + 0.3*1 = 0.9;  B: 0.4*2 + 0.3*1 = 1.1;  C: 0.4*1 + 0.3*1 = 0.7
# so MAP picks A (index 0) and minimum risk picks C.
# Word posteriors of C's words (summed posterior of hypotheses holding the word at the
# aligned position): a 0.4+0.3+0.3 = 1.0; x (B, C) 0.6; c (A, C) 0.7.
LIST = {"id": "u1", "reference": "a x c", "hypotheses": [
    {"text": "a b c", "acoustic": math.log(0.4)},
    {"text": "a x d", "acoustic": math.log(0.3)},
    {"text": "a x c", "acoustic": math.log(0.3)}]}
PLAIN = {"acoustic_scale": 1.0, "lm_weight": 0.0, "insertion_penalty": 0.0, "features": {}}


def _files(tmp_path: Path, **extra: object) -> tuple[Path, Path]:
    nbest = tmp_path / "in.jsonl"
    nbest.write_text(json.dumps(LIST) + "\n")
    weights = tmp_path / "w.json"
    weights.write_text(json.dumps(PLAIN | extra))
    return nbest, weights


def _apply(tmp_path: Path, weights: Path, nbest: Path, *more: str) -> tuple[dict, str]:
    out, text = tmp_path / "out.jsonl", tmp_path / "out.tsv"
    result = run(["apply", nbest, "--weights", weights, "-o", out, "--text", text, *more])
    assert result.exit_code == 0, result.output
    return json.loads(out.read_text()), text.read_text()


def test_min_risk_differs_from_map_and_confidences_match_hand_working(tmp_path: Path) -> None:
    nbest, weights = _files(tmp_path, posterior_scale=1.0)
    rec, text = _apply(tmp_path, weights, nbest, "--choose", "min-risk")
    assert rec["best"] == 0  # still the top-scoring hypothesis (A)
    assert rec["chosen"] == "a x c" and text == "u1\ta x c\n"
    assert [w for w, _ in rec["word_posteriors"]] == ["a", "x", "c"]
    assert [c for _, c in rec["word_posteriors"]] == pytest.approx([1.0, 0.6, 0.7])
    # no calibration in the weights: the confidences are the raw posteriors
    assert rec["word_confidences"] == rec["word_posteriors"]


def test_consensus_votes_per_bin(tmp_path: Path) -> None:
    # all three have 3 words and align position by position (substitutions only), so the
    # bins are {a: 1.0}, {b: 0.4, x: 0.6}, {c: 0.7, d: 0.3} (Mangu, Brill and Stolcke
    # 2000: posteriors summed per bin); the heaviest words give "a x c" at 1.0, 0.6, 0.7
    nbest, weights = _files(tmp_path, posterior_scale=1.0)
    rec, text = _apply(tmp_path, weights, nbest, "--choose", "consensus")
    assert rec["chosen"] == "a x c" and text == "u1\ta x c\n"
    assert [c for _, c in rec["word_posteriors"]] == pytest.approx([1.0, 0.6, 0.7])


def test_scale_in_weights_adds_fields_under_best_and_calibration_maps_them(
        tmp_path: Path) -> None:
    # best = A "a b c"; posteriors a 1.0, b 0.4 (A only), c 0.7 (A and C)
    # the map x [0, 1] -> y [0.5, 0.5] is flat: every calibrated confidence is 0.5
    nbest, weights = _files(tmp_path, posterior_scale=1.0, calibration={
        "method": "isotonic", "x": [0.0, 1.0], "y": [0.5, 0.5]})
    rec, text = _apply(tmp_path, weights, nbest)
    assert rec["chosen"] == "a b c" and text == "u1\ta b c\n"
    assert [c for _, c in rec["word_posteriors"]] == pytest.approx([1.0, 0.4, 0.7])
    assert [c for _, c in rec["word_confidences"]] == pytest.approx([0.5, 0.5, 0.5])


def test_old_weights_file_gives_todays_output(tmp_path: Path) -> None:
    nbest, weights = _files(tmp_path)
    rec, text = _apply(tmp_path, weights, nbest)
    assert "chosen" not in rec and "word_confidences" not in rec
    assert rec["best"] == 0 and text == "u1\ta b c\n"
    # a weights file without the decoding keys is written with exactly the old keys
    written = json.loads(weights_text("w.json", Weights(lm_weight=9.0), {}))
    assert list(written) == ["acoustic_scale", "lm_weight", "insertion_penalty", "features",
                             "provenance"]


@pytest.mark.parametrize(("extra", "field"), [
    ({"posterior_scale": -1.0}, "posterior_scale"),
    ({"posterior_scale": "x"}, "posterior_scale"),
    ({"choose": "vote"}, "choose"),
    ({"calibration": {"method": "isotonic", "x": [1.0, 0.0], "y": [0.0, 1.0]}},
     "calibration"),
])
def test_bad_decoding_keys_are_one_line_errors(tmp_path: Path, extra: dict[str, object],
                                                field: str) -> None:
    nbest, weights = _files(tmp_path, **extra)
    result = run(["apply", nbest, "--weights", weights, "-o", tmp_path / "o.jsonl"])
    assert result.exit_code == 1
    assert f"{weights}: {field}:" in result.output
    assert not (tmp_path / "o.jsonl").exists()


def test_weights_round_trip_the_decoding_keys(tmp_path: Path) -> None:
    _, weights = _files(tmp_path, posterior_scale=0.25, choose="consensus")
    w = read_weights(weights)
    assert (w.posterior_scale, w.choose, w.calibration) == (0.25, "consensus", None)


def test_fit_decoding_rule_wers_by_hand() -> None:
    # reference "a x c": errors A 1, B 1, C 0, so C is the oracle. Its log posterior
    # s*log 0.3 - log(0.4^s + 2*0.3^s) is largest as s -> 0 (p(C) -> 1/3 > 0.3 at s = 1),
    # so the scale fit stops at the lower bound, where the posterior is uniform (1/3 each).
    # Uniform expected errors: A (2+1)/3 = 1, B (2+1)/3 = 1, C (1+1)/3 = 2/3 -> min-risk C,
    # 0 errors. Consensus bins {b 1/3, x 2/3}, {c 2/3, d 1/3} -> "a x c", 0 errors.
    # best is A: 1 error in 3 reference words.
    m = FeatureMatrix(names=("acoustic", "words"),
                      values=np.array([[math.log(0.4), 3], [math.log(0.3), 3],
                                       [math.log(0.3), 3]]),
                      offsets=np.array([0, 3]), ids=("u1",), errors=np.array([1, 1, 0]),
                      ref_words=np.array([3]))
    texts = DevTexts(hypotheses=(["a", "b", "c"], ["a", "x", "d"], ["a", "x", "c"]),
                     references=(["a", "x", "c"],))
    fit = fit_decoding(m, Weights(), texts, "min-risk")
    assert fit.scale.at_bound
    assert fit.rule_wer == pytest.approx({"best": 1 / 3, "min-risk": 0.0, "consensus": 0.0})
    w = fit.apply_to(Weights())
    assert w.choose == "min-risk" and w.posterior_scale == fit.scale.scale
    assert w.calibration is not None and w.calibration["method"] == "isotonic"
    # without a rule given, none is stored (apply keeps best) and best is calibrated
    assert fit_decoding(m, Weights(), texts).apply_to(Weights()).choose is None


def _system_file(path: Path, hyps: list[tuple[str, float]], uid: str = "u1") -> Path:
    path.write_text(json.dumps({"id": uid, "reference": "a b", "hypotheses": [
        {"text": t, "acoustic": a} for t, a in hyps]}) + "\n")
    return path


def test_combine_marks_missing_scores(tmp_path: Path) -> None:
    a = _system_file(tmp_path / "a.jsonl", [("a b", -1.0)])
    b = _system_file(tmp_path / "b.jsonl", [("A b", -2.0), ("c", -5.0)])
    out = tmp_path / "c.jsonl"
    result = run(["combine", a, b, "-o", out])
    assert result.exit_code == 0, result.output
    rec = json.loads(out.read_text())
    # "a b" and "A b" are one hypothesis after normalisation (lower-casing);
    # "c" is missing from system a: it gets a's lowest score of the list (-1.0), missing:a 1
    feats = [h["features"] for h in rec["hypotheses"]]
    assert [h["text"] for h in rec["hypotheses"]] == ["a b", "c"]
    assert feats[0] == {"acoustic:a": -1.0, "missing:a": 0.0, "acoustic:b": -2.0,
                        "missing:b": 0.0}
    assert feats[1] == {"acoustic:a": -1.0, "missing:a": 1.0, "acoustic:b": -5.0,
                        "missing:b": 0.0}


def test_combine_refuses_partial_ids_unless_kept(tmp_path: Path) -> None:
    a = _system_file(tmp_path / "a.jsonl", [("a b", -1.0)])
    b = _system_file(tmp_path / "b.jsonl", [("a b", -1.0)], uid="u2")
    out = tmp_path / "c.jsonl"
    result = run(["combine", a, b, "-o", out])
    assert result.exit_code == 1 and "u1" in result.output and not out.exists()
    assert run(["combine", a, b, "-o", out, "--partial", "keep"]).exit_code == 0
    assert len(out.read_text().splitlines()) == 2
    assert run(["combine", a, "-o", out]).exit_code == 2


def test_report_confidence_section_by_hand(tmp_path: Path) -> None:
    nbest, weights = _files(tmp_path, posterior_scale=1.0)
    out = tmp_path / "after.jsonl"
    assert run(["apply", nbest, "--weights", weights, "-o", out]).exit_code == 0
    result = run(["report", "--before", nbest, "--after", out, "-o", tmp_path / "rep"])
    assert result.exit_code == 0, result.output
    conf = json.loads((tmp_path / "rep" / "report.json").read_text())["confidence"]
    # after = best = "a b c" against "a x c": a right (conf 1.0), b wrong (0.4), c right
    # (0.7). Accuracy 2/3. Bins of width 0.1: [0.4, 0.5) holds b (accuracy 0), [0.7, 0.8)
    # holds c (1), [0.9, 1.0] holds a (1). ECE = (1/3)(|0 - 0.4| + |1 - 0.7| + |1 - 1|)
    # = 0.7 / 3. Review lowest first: b is the only error, so 1/3 of the words reviewed
    # catch all errors.
    assert conf["words"] == 3 and conf["accuracy"] == pytest.approx(2 / 3)
    assert [b["words"] for b in conf["reliability"]] == [0, 0, 0, 0, 1, 0, 0, 1, 0, 1]
    assert conf["ece"] == pytest.approx(0.7 / 3)
    assert conf["review"][-1] == {"reviewed": 0.5, "errors_caught": 1.0}
    assert "this test set" in conf["caution"]
    # NCE (NIST's definition): H(C) = -(2 log2(2/3) + log2(1/3)) = 2.7549 bits;
    # H(C|conf) = -(log2(1 - 1e-6) + log2(1 - 0.4) + log2(0.7)) = 1.2515 (1.0 is clipped
    # to 1 - 1e-6); NCE = (2.7549 - 1.2515) / 2.7549 = 0.5457
    h_c = -(2 * math.log2(2 / 3) + math.log2(1 / 3))
    h_cond = -(math.log2(1 - 1e-6) + math.log2(0.6) + math.log2(0.7))
    assert conf["nce"] == pytest.approx((h_c - h_cond) / h_c)
    assert conf["nce"] == pytest.approx(0.5457, abs=1e-4)
    assert "## Word confidences" in (tmp_path / "rep" / "report.md").read_text()
