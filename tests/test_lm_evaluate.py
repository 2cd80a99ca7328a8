"""Perplexity and per-sentence scores: each sentence's figures against its token values."""

from __future__ import annotations

import json
import math
from pathlib import Path

import numpy as np
import pytest
from lm_reference import ReferenceModel

from rescore.lm import NGramModel, perplexity, sentence_scores, summarise

LN10 = math.log(10.0)
TRAIN = [["pump", "two", "on"], ["pump", "three", "off"], ["vent", "bay", "three", "open"]]
PROBE = [["pump", "two", "off"], ["vent", "four", "open", "<unk>"], ["bay"], []]


@pytest.mark.parametrize("closed", [False, True])
@pytest.mark.parametrize("method", ["mkn", "wb", "addk"])
def test_sentence_scores_are_sums_of_token_values(method: str, closed: bool) -> None:
    model = NGramModel(3, method, closed_vocab=closed).fit(TRAIN)
    scores = list(sentence_scores(model, PROBE))
    per_token = model.token_logprobs(PROBE)
    ref = ReferenceModel(TRAIN, 3, method, closed=closed)
    for sc, words, tok in zip(scores, PROBE, per_token, strict=True):
        assert sc.text == " ".join(words) and sc.words == len(words)
        # chain rule: a sentence's log probability is the sum of its tokens' (derivation);
        # a closed vocabulary leaves OOV words unscored (NaN), an open one scores them
        assert sc.log10_prob == pytest.approx(float(np.nansum(tok)) / LN10, abs=1e-12)
        assert sc.tokens == int(np.count_nonzero(~np.isnan(tok)))
        # the plain reference of tests/lm_reference.py, written from the formulas
        assert sc.log10_prob == pytest.approx(ref.sentence_logprob(words) / LN10, abs=1e-9)
    # OOV counted by hand: "four" and the literal "<unk>" are not training words
    assert [sc.oov for sc in scores] == [0, 2, 0, 0]
    # tokens: words and </s>, never <s>; a closed vocabulary drops the OOV words (contract)
    assert [sc.tokens for sc in scores] == ([4, 3, 2, 1] if closed else [4, 5, 2, 1])


def test_summarise_equals_perplexity() -> None:
    model = NGramModel(3).fit(TRAIN)
    result = perplexity(model, PROBE)
    assert summarise(sentence_scores(model, PROBE)) == result
    assert result.sentence_log10 == tuple(sc.log10_prob for sc in sentence_scores(model, PROBE))
    # the contract: perplexity = 10 ** (-log10_prob / tokens)
    assert result.perplexity == pytest.approx(10 ** (-result.log10_prob / result.tokens))
    assert result.tokens == 4 + 5 + 2 + 1 and result.oov == 2 and result.words == 8


def test_zero_probability_sentence_is_null_in_json() -> None:
    # maximum likelihood gives an unseen bigram probability 0 (relative frequency, from
    # memory): log10 is -inf, written as null (JSON has no infinity, RFC 8259)
    model = NGramModel(2, "mle").fit(TRAIN)
    (sc,) = sentence_scores(model, [["pump", "bay"]])
    assert sc.log10_prob == -math.inf and sc.to_dict()["log10_prob"] is None


def test_sentence_scores_of_empty_text_refused_without_output(tmp_path: Path) -> None:
    # like every corpus reader (README, guarantees): text with no sentences is an input
    # error, not a perplexity of nan, and the scores file is not written
    from rescore.errors import InputError
    from rescore.lm import NGramModel
    from rescore.lm.evaluate import write_sentence_scores

    model = NGramModel(order=2).fit([["vent", "bay", "one"]])
    empty = tmp_path / "empty.txt"
    empty.write_text("\n  \n")
    with pytest.raises(InputError, match="no sentences"):
        write_sentence_scores(model, empty, tmp_path / "scores.jsonl")
    assert sorted(p.name for p in tmp_path.iterdir()) == ["empty.txt"]


@pytest.mark.parametrize("closed", [False, True])
def test_text_read_from_file_scores_as_its_word_lists(tmp_path: Path, closed: bool) -> None:
    # a corpus read from a file is scored from its bytes straight to ids; the rule is the
    # same text as word lists (one sentence per non-blank line, normalised by tokens())
    from rescore.lm import read_corpus
    from rescore.lm.evaluate import write_sentence_scores
    from rescore.text import tokens

    lines = ["Pump TWO off.", "", "vent four, open <unk>", "  ", "bay", "re-seed 'pump'",
             "Pump\u2019s b\u00e4y three"] * 40
    path = tmp_path / "probe.txt"
    path.write_text("\n".join(lines) + "\n", encoding="utf-8")
    model = NGramModel(order=3, closed_vocab=closed).fit(TRAIN * 5)
    want = perplexity(model, [tokens(t) for t in lines if tokens(t)])
    assert perplexity(model, read_corpus(path)) == want
    scores = tmp_path / "scores.jsonl"
    assert write_sentence_scores(model, path, scores) == want
    got = [json.loads(row) for row in scores.read_text(encoding="utf-8").splitlines()]
    numbered = [(n, tokens(t)) for n, t in enumerate(lines, start=1) if tokens(t)]
    assert [(g["line"], g["text"]) for g in got] == [(n, " ".join(w)) for n, w in numbered]
    assert [g["log10_prob"] for g in got] == list(want.sentence_log10)


def test_partly_read_corpus_scores_only_what_is_left(tmp_path: Path) -> None:
    # a Corpus is an iterator: once its first sentence is taken, the rest is what remains,
    # so it must not be re-read from the file's start as blocks
    from rescore.lm import read_corpus

    path = tmp_path / "probe.txt"
    path.write_text("pump two off\nvent bay\nbay three open\n", encoding="utf-8")
    model = NGramModel(order=2).fit(TRAIN)
    corpus = read_corpus(path)
    assert next(corpus) == ["pump", "two", "off"]
    assert perplexity(model, corpus) == perplexity(model, [["vent", "bay"],
                                                           ["bay", "three", "open"]])
