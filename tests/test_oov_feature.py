"""The unknown-word count per LM (``oov_count``, ``oov_count:NAME``) as a tunable column."""

from __future__ import annotations

import json
from pathlib import Path

import numpy as np

from rescore.lm import NGramModel, save_model
from rescore.nbest import iter_nbest
from rescore.scoring import build_matrix, oov_column
from rescore.text import tokens
from tests.conftest import FIXTURES, run

DEMO = FIXTURES / "demo"


def _nbest(path: Path) -> Path:
    lines = [
        {"id": "u1", "reference": "add flour now",
         "hypotheses": [{"text": "add flower now", "acoustic": -10.0},
                        {"text": "add flour now", "acoustic": -10.5}]},
        {"id": "u2", "reference": "water the beans",
         "hypotheses": [{"text": "water the beans", "acoustic": -8.0}]},
    ]
    path.write_text("".join(json.dumps(x) + "\n" for x in lines))
    return path


def test_oov_columns_count_words_outside_each_vocabulary(tmp_path: Path) -> None:
    main = NGramModel(2).fit([["add", "flour", "now"], ["water", "the", "beans"]])
    other = NGramModel(2).fit([["add", "flower"]])
    path = _nbest(tmp_path / "n.jsonl")
    m = build_matrix(list(iter_nbest(path)), path=str(path), lms={"lm": main, "other": other},
                     features=[oov_column("lm"), oov_column("other")]).matrix
    assert m.names[-2:] == ("oov_count", "oov_count:other")
    # by hand: main lacks "flower" (1, 0, 0); other knows only add and flower:
    # "add flower now" -> now (1); "add flour now" -> flour, now (2); "water the beans" -> 3
    assert m.column("oov_count").tolist() == [1, 0, 0]
    assert m.column("oov_count:other").tolist() == [1, 2, 3]


def test_tune_oov_feature_stores_a_weight_that_apply_uses(tmp_path: Path) -> None:
    model = NGramModel(3).fit(
        [line.split() for line in (DEMO / "train.txt").read_text().splitlines()[:100]])
    lm = tmp_path / "small.lm"
    save_model(model, lm)
    weights = tmp_path / "w.json"
    res = run(["tune", DEMO / "dev.jsonl", "--lm", lm, "--oov-feature", "--folds", "0",
               "-o", weights, "--json"])
    assert res.exit_code == 0, res.stderr
    assert "oov_count" in json.loads(weights.read_text())["features"]
    out = tmp_path / "t.jsonl"
    res = run(["apply", DEMO / "test.jsonl", "--lm", lm, "--weights", weights, "-o", out])
    assert res.exit_code == 0, res.stderr
    # off by default: without the option no such weight appears
    plain = tmp_path / "p.json"
    assert run(["tune", DEMO / "dev.jsonl", "--lm", lm, "--folds", "0", "-o", plain]
               ).exit_code == 0
    assert "oov_count" not in json.loads(plain.read_text())["features"]
    # the rescored totals include the weighted count: recompute one from its parts
    rec = json.loads(out.read_text().splitlines()[0])
    w = json.loads(weights.read_text())
    hyp = rec["hypotheses"][0]
    oov = int(model.oov_counts([tokens(hyp["text"])])[0])
    expected = (w["acoustic_scale"] * hyp["acoustic"] + w["lm_weight"] * hyp["lm"]
                + w["insertion_penalty"] * hyp["word_count"] + w["features"]["oov_count"] * oov)
    assert np.isclose(hyp["total"], expected, rtol=1e-9)


def test_oov_feature_without_lm_is_a_usage_error(tmp_path: Path) -> None:
    res = run(["tune", DEMO / "dev.jsonl", "--oov-feature", "-o", tmp_path / "w.json"])
    assert res.exit_code == 2 and res.stderr.startswith("error:")
    assert not (tmp_path / "w.json").exists()
