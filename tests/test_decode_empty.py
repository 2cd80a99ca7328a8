"""``apply``'s count of utterances that output no words follows the output of the choice
rule (``chosen`` under --choose), not the top-scoring hypothesis."""

from __future__ import annotations

import json
import math
from pathlib import Path
from typing import Any

import pytest

from tests.conftest import run

# Acoustic scores are log posteriors, so with acoustic_scale 1, no LM and posterior scale 1
# the posteriors are exactly the numbers given.
#
# TOP_EMPTY: "" 0.4 (the top score), "open vent" 0.3, "open went" 0.3.
#   Expected word errors (Stolcke, Konig and Weintraub 1997: sum_g p(g) d(h, g)), by hand:
#   "": 0.3*2 + 0.3*2 = 1.2; "open vent": 0.4*2 + 0.3*1 = 1.1; "open went": likewise 1.1,
#   so min-risk outputs "open vent" (the earlier of the tie).
#   Consensus (Mangu, Brill and Stolcke 2000): "open" holds 0.6 of its bin against the
#   empty word's 0.4, "vent"/"went" 0.3 each against 0.4: the output is "open".
TOP_EMPTY = {"id": "u1", "reference": "open vent", "hypotheses": [
    {"text": "", "acoustic": math.log(0.4)},
    {"text": "open vent", "acoustic": math.log(0.3)},
    {"text": "open went", "acoustic": math.log(0.3)}]}
# TOP_WORDS: "a b c" 0.34 (the top score), "" 0.26, "d" 0.2, "e" 0.2.
#   Expected word errors, by hand (d("a b c", "d") = 3: two deletions, one substitution):
#   "a b c": 3*(0.26 + 0.2 + 0.2) = 1.98; "": 3*0.34 + 0.2 + 0.2 = 1.42;
#   "d": 3*0.34 + 0.26 + 0.2 = 1.48; "e": likewise 1.48, so min-risk outputs "".
#   Consensus keeps "a" (0.34 is the heaviest entry of its bin), so it outputs words.
TOP_WORDS = {"id": "u2", "reference": "a b c", "hypotheses": [
    {"text": "a b c", "acoustic": math.log(0.34)},
    {"text": "", "acoustic": math.log(0.26)},
    {"text": "d", "acoustic": math.log(0.2)},
    {"text": "e", "acoustic": math.log(0.2)}]}
WEIGHTS = {"acoustic_scale": 1.0, "lm_weight": 0.0, "insertion_penalty": 0.0,
           "features": {}, "posterior_scale": 1.0}


def _apply(tmp_path: Path, record: dict[str, Any], choose: str) -> tuple[str, dict[str, Any]]:
    nbest, weights, out = tmp_path / "in.jsonl", tmp_path / "w.json", tmp_path / "out.jsonl"
    nbest.write_text(json.dumps(record) + "\n")
    weights.write_text(json.dumps(WEIGHTS))
    result = run(["apply", nbest, "--weights", weights, "-o", out, "--choose", choose])
    assert result.exit_code == 0, result.output
    return result.output, json.loads(out.read_text())


@pytest.mark.parametrize(("record", "choose", "chosen", "empty"), [
    (TOP_EMPTY, "best", "", 1),
    (TOP_EMPTY, "min-risk", "open vent", 0),
    (TOP_EMPTY, "consensus", "open", 0),
    (TOP_WORDS, "best", "a b c", 0),
    (TOP_WORDS, "min-risk", "", 1),
    (TOP_WORDS, "consensus", "a", 0),
])
def test_empty_count_follows_the_chosen_output(tmp_path: Path, record: dict[str, Any],
                                               choose: str, chosen: str, empty: int) -> None:
    output, rec = _apply(tmp_path, record, choose)
    assert rec["best"] == 0  # the top-scoring hypothesis, whatever the rule output
    assert rec["chosen"] == chosen
    assert f"{empty} chose an empty hypothesis" in output


def test_empty_count_without_decoding_keys_is_the_top_hypothesis(tmp_path: Path) -> None:
    # a weights file with neither rule nor posterior scale: no `chosen` in the record, and
    # the count is of the hypothesis at `best` (the empty one here)
    nbest, weights, out = tmp_path / "in.jsonl", tmp_path / "w.json", tmp_path / "out.jsonl"
    nbest.write_text(json.dumps(TOP_EMPTY) + "\n" + json.dumps(TOP_WORDS) + "\n")
    weights.write_text(json.dumps({k: v for k, v in WEIGHTS.items()
                                   if k != "posterior_scale"}))
    result = run(["apply", nbest, "--weights", weights, "-o", out])
    assert result.exit_code == 0, result.output
    assert all("chosen" not in json.loads(line) for line in out.read_text().splitlines())
    assert "1 chose an empty hypothesis" in result.output
