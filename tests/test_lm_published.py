"""Published formulas and worked examples, and NLTK's nltk.lm as a reference library."""

from __future__ import annotations

import math

import numpy as np
import pytest
from nltk.lm import MLE, Lidstone, WittenBellInterpolated
from nltk.lm.preprocessing import padded_everygram_pipeline

from rescore.lm import NGramModel
from rescore.lm.backoff import estimate
from rescore.lm.counts import count_ngrams, window_floor
from rescore.lm.smoothing import (
    AddK,
    KneserNey,
    MaximumLikelihood,
    OrderStats,
    modified_discounts,
)
from rescore.lm.vocab import Vocabulary, encode

TOL = 1e-9


def test_chen_goodman_discounts() -> None:
    # Chen and Goodman (1998): Y = n1/(n1+2n2), D1 = 1-2Y n2/n1, D2 = 2-3Y n3/n2,
    # D3+ = 3-4Y n4/n3. n1..n4 = 100, 40, 20, 10 gives Y = 5/9 and the values below.
    (d1, d2, d3), fallback = modified_discounts([100, 40, 20, 10])
    assert fallback is None
    assert (round(d1, 4), round(d2, 4), round(d3, 4)) == (0.5556, 1.1667, 1.8889)


@pytest.mark.parametrize("n", [[0, 5, 3, 1], [5, 0, 3, 1], [10, 1, 0, 2], [10, 1, 1, 20]])
def test_degenerate_counts_of_counts_fall_back(n: list[int]) -> None:
    # our fallback rule (README, language models): one D = n1/(n1+2 n2) for all counts,
    # 0.5 if n1 or n2 is zero
    (d1, d2, d3), fallback = modified_discounts(n)
    want = 0.5 if n[0] == 0 or n[1] == 0 else n[0] / (n[0] + 2 * n[1])
    assert fallback and d1 == d2 == d3 == pytest.approx(want)


def _bigram_from_counts(method: object, pairs: dict[str, tuple[float, float]], v: int) -> dict[
        str, float]:
    """P(w | h) = alpha + gamma / V for one whole-history bigram order over uniform."""
    counts, prefix = [], []
    for i, (hit, total) in enumerate(pairs.values()):
        counts += [hit, total - hit]  # the bigram asked about, and the rest of the context
        prefix += [i, i]
    stats = OrderStats(2, np.array(counts, float), np.array(prefix), len(pairs),
                       np.ones(len(counts), bool), v)
    est = method.estimate(stats)  # type: ignore[attr-defined]
    out = {}
    for i, name in enumerate(pairs):
        denom = pairs[name][1] + est.extra[i]
        lost = (counts[2 * i] - est.numer[2 * i]) + (counts[2 * i + 1] - est.numer[2 * i + 1])
        gamma = (est.extra[i] + lost) / denom
        out[name] = est.numer[2 * i] / denom + gamma / v
    return out


# Jurafsky and Martin, Speech and Language Processing, 3rd ed. draft, chapter 3: the
# restaurant corpus. Counts from the chapter's tables (recalled from memory): c(i) = 2533,
# c(i want) = 827, c(want) = 927, c(want to) = 608, c(chinese) = 158, c(chinese food) = 82;
# V = 1446. Tested on the estimator with these given counts.
RESTAURANT = {"want|i": (827.0, 2533.0), "to|want": (608.0, 927.0),
              "food|chinese": (82.0, 158.0)}


def test_restaurant_bigrams_mle() -> None:
    p = _bigram_from_counts(MaximumLikelihood(), RESTAURANT, 1446)
    assert round(p["want|i"], 2) == 0.33  # 827 / 2533
    assert round(p["to|want"], 2) == 0.66  # 608 / 927
    assert round(p["food|chinese"], 2) == 0.52  # 82 / 158
    assert p["want|i"] == pytest.approx(827 / 2533, abs=TOL)


def test_restaurant_bigrams_add_one() -> None:
    p = _bigram_from_counts(AddK(1.0), RESTAURANT, 1446)
    assert p["want|i"] == pytest.approx(828 / 3979, abs=TOL)
    assert round(p["want|i"], 2) == 0.21


def test_three_sentence_corpus_interpolated_kn() -> None:
    # The chapter's three sentences, built as a corpus, bigram interpolated KN at D = 0.75,
    # recursion ending in the uniform distribution (the chapter's formula). By hand:
    # c(i am) = 2, c(i .) = 3, two types after "i": lambda(i) = 0.75 * 2 / 3 = 0.5.
    # 15 bigram types; "am" follows one word: P_cont part (1 - 0.75) / 15; 11 unigram types
    # with a continuation count: lambda = 0.75 * 11 / 15; V = 10 words + </s> + <unk> = 12.
    sents = [s.split() for s in ("i am sam", "sam i am", "i do not like green eggs and ham")]
    vocab = Vocabulary.from_words(sorted({w for s in sents for w in s}))
    stream, _ = encode(vocab, sents)
    counts = count_ngrams(stream.tokens, window_floor(stream, False), 2, len(vocab))
    tables, _ = estimate(counts, KneserNey(discount=0.75), vocab, closed_vocab=False,
                         cutoffs=None, prune=None)
    model = NGramModel.from_tables(tables, {"method": "kn"})
    p_am = (1 - 0.75) / 15 + (0.75 * 11 / 15) / 12
    want = (2 - 0.75) / 3 + 0.5 * p_am
    assert math.exp(model.logprob_ngrams([["i", "am"]])[0]) == pytest.approx(want, abs=TOL)
    # "sam" follows "am" and "<s>": continuation count 2
    p_sam = (2 - 0.75) / 15 + (0.75 * 11 / 15) / 12
    assert math.exp(model.logprob_ngrams([["sam"]])[0]) == pytest.approx(p_sam, abs=TOL)


# NLTK pads a bigram model with one <s> and one </s>, as we do, so bigram counts agree.
CORPUS = [s.split() for s in ("pump two on", "pump three off", "vent bay three open",
                              "pump two off", "lamp row one on", "vent two open")]


# NLTK's vocabulary holds <s> (it masks training text with it) and adds <UNK>; ours never
# predicts <s>. Where the size matters (Lidstone) our model gets one unused extra word.
SPARE = "zz-spare-word"


def _nltk(model_cls: type, *args: float) -> object:
    train, _ = padded_everygram_pipeline(2, CORPUS)
    lm = model_cls(*args, 2)
    lm.fit(train, [w for s in CORPUS for w in s] + ["<s>", "</s>"])
    return lm


def _contexts() -> list[str]:
    return ["<s>", "pump", "two", "three", "vent", "on"]


def _predicted() -> list[str]:
    return [*sorted({w for s in CORPUS for w in s}), "</s>"]


def test_mle_matches_nltk() -> None:
    ours = NGramModel(2, "mle").fit(CORPUS)
    lm = _nltk(MLE)
    for h in _contexts():
        got = np.exp(ours.logprob_ngrams([[h, w] for w in _predicted()]))
        want = [lm.score(w, [h]) for w in _predicted()]  # type: ignore[attr-defined]
        np.testing.assert_allclose(got, want, atol=TOL)


@pytest.mark.parametrize("k", [0.1, 1.0])
def test_lidstone_matches_nltk(k: float) -> None:
    words = sorted({w for s in CORPUS for w in s})
    ours = NGramModel(2, "addk", k=k, vocab=[*words, SPARE]).fit(CORPUS)
    lm = _nltk(Lidstone, k)
    assert len(lm.vocab) == len(ours.vocab_) - 1  # type: ignore[attr-defined]  # ids less <s>
    for h in [*_contexts(), "never"]:
        got = np.exp(ours.logprob_ngrams([[h, w] for w in _predicted()]))
        want = [lm.score(w, [h]) for w in _predicted()]  # type: ignore[attr-defined]
        np.testing.assert_allclose(got, want, atol=TOL)


def test_witten_bell_matches_nltk_above_unigrams() -> None:
    # Definitional difference: NLTK ends the recursion at the unigram MLE (with <s> in its
    # denominator); we interpolate the unigrams with the uniform distribution. So NLTK's
    # bigram alpha and gamma are combined with our own unigram probability.
    ours = NGramModel(2, "wb").fit(CORPUS)
    lm = _nltk(WittenBellInterpolated)
    for h in _contexts():
        for w in _predicted():
            alpha, gamma = lm.estimator.alpha_gamma(w, (h,))  # type: ignore[attr-defined]
            p1 = math.exp(ours.logprob_ngrams([[w]])[0])
            got = math.exp(ours.logprob_ngrams([[h, w]])[0])
            assert got == pytest.approx(alpha + gamma * p1, abs=TOL)
