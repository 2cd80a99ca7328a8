"""The fast engine against its definitions: normalisation and the slow reference model."""

from __future__ import annotations

import itertools
import math

import numpy as np
import pytest
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st
from lm_reference import ReferenceModel, assert_matches_reference

from rescore.errors import UsageError
from rescore.lm import METHODS, NGramModel
from rescore.lm.counts import count_ngrams, window_floor
from rescore.lm.vocab import Vocabulary, encode

NORM_TOL = 1e-9  # our tolerance for sums of probabilities and reference matches
ALL_METHODS = list(METHODS)

corpora = st.lists(
    st.lists(st.sampled_from("abcde"), min_size=0, max_size=7), min_size=1, max_size=8
)


def _context_sums(model: NGramModel, histories: set[tuple[str, ...]]) -> list[float]:
    predictable = [w for w in model.vocab_.words if w != "<s>"]
    if model.closed_vocab:
        predictable.remove("<unk>")
    sums = []
    for h in histories:
        lp = model.logprob_ngrams([[*h, w] for w in predictable])
        sums.append(float(np.exp(lp).sum()))
    return sums


@pytest.mark.parametrize("method", ALL_METHODS)
@settings(max_examples=25, deadline=None, suppress_health_check=[HealthCheck.too_slow])
@given(sents=corpora, order=st.integers(1, 5))
def test_every_context_sums_to_one(method: str, sents: list[list[str]], order: int) -> None:
    # definition of a conditional distribution: over the vocabulary plus </s>
    model = NGramModel(order, method).fit(sents)
    ref = ReferenceModel(sents, order, method)
    for total in _context_sums(model, ref.histories()):
        assert abs(total - 1.0) < NORM_TOL


@pytest.mark.parametrize("method", ALL_METHODS)
@settings(max_examples=25, deadline=None, suppress_health_check=[HealthCheck.too_slow])
@given(sents=corpora, order=st.integers(1, 5), k=st.sampled_from([0.1, 0.5, 1.0]))
def test_matches_dict_reference(method: str, sents: list[list[str]], order: int, k: float) -> None:
    # the plain reference in tests/lm_reference.py writes each formula out directly
    model = NGramModel(order, method, k=k).fit(sents)
    ref = ReferenceModel(sents, order, method, k=k)
    assert_matches_reference(model, ref, NORM_TOL)
    probe = [*sents, ["a", "zzz-unseen", "b"], []]
    want_s = [ref.sentence_logprob(s) for s in probe]
    np.testing.assert_allclose(model.logprob(probe), want_s, rtol=1e-9, atol=NORM_TOL)


@pytest.mark.parametrize(("order", "closed", "alphabet", "longest"), [
    (2, True, ["a", "b"], 12),  # closed vocabulary: no other word can be generated
    # open vocabulary: one unseen word stands for <unk>, the class of every unknown word
    (3, False, ["a", "b", "zzz-unseen"], 9),
])
@pytest.mark.parametrize("method", ALL_METHODS)
def test_sentence_probabilities_of_tiny_vocabulary_approach_one(
    method: str, order: int, closed: bool, alphabet: list[str], longest: int
) -> None:
    # a proper sentence model: P(all sentences up to length L) -> 1 as L grows. Derivation
    # (chain rule, each position's distribution over the words and </s> summing to one):
    # P(sentences of length <= L) + P(all word prefixes of length L + 1) = 1 exactly, so
    # the shortfall is the mass of the longer sentences, which shrinks with L
    sents = [["a"], ["a", "b"], ["b", "a", "a"], ["b"]]
    model = NGramModel(order, method, closed_vocab=closed).fit(sents)
    totals = []
    layer: list[list[str]] = [[]]
    acc = 0.0
    for _length in range(0, longest + 1):
        acc += float(np.exp(model.logprob(layer)).sum())
        totals.append(acc)
        layer = [[*s, w] for s in layer for w in alphabet]
        prefixes = sum(float(np.exp(t[:-1].sum())) for t in model.token_logprobs(layer))
        assert abs(acc + prefixes - 1.0) < NORM_TOL
    # the shortfall never grows; on these 1- to 3-word training sentences it is under 0.1
    # by the last length (observed)
    assert all(b >= a - 1e-15 for a, b in itertools.pairwise(totals))
    assert totals[-1] > 0.9 and totals[-1] <= 1.0 + NORM_TOL


@pytest.mark.parametrize("order", [2, 3, 4])
def test_packed_and_per_order_counting_agree(order: int) -> None:
    # the packed path (all orders from one sort) must give exactly the arrays of the
    # per-order path; both are checked against the definition by counting every window:
    # a sentence of n words padded to n + 2 tokens holds n + 2 - k + 1 windows of k tokens,
    # and the <s> unigram is one of them (derivation)
    rng = np.random.default_rng(7)
    words = [f"w{i}" for i in range(30)]
    sents = [[words[j] for j in rng.integers(0, 30, rng.integers(0, 9))] for _ in range(200)]
    vocab = Vocabulary.from_words(words)
    stream, _ = encode(vocab, sents)
    floor = window_floor(stream, False)
    a = count_ngrams(stream.tokens, floor, order, len(vocab), packed=True)
    b = count_ngrams(stream.tokens, floor, order, len(vocab), packed=False)
    for k, x in enumerate(a, start=1):
        assert int(x.count.sum()) == sum(max(len(s) + 2 - k + 1, 0) for s in sents)
    for x, y in zip(a, b, strict=True):
        np.testing.assert_array_equal(x.suffix, y.suffix)
        np.testing.assert_array_equal(x.first, y.first)
        np.testing.assert_array_equal(x.count, y.count)


def test_counts_match_collections_counter() -> None:
    # every window of the padded sentence, counted one by one
    from collections import Counter

    sents = [["a", "b", "a"], ["b"], [], ["a", "a", "a", "a"]]
    vocab = Vocabulary.from_words("ab")
    stream, _ = encode(vocab, sents)
    tables = count_ngrams(stream.tokens, window_floor(stream, False), 3, len(vocab))
    expected: Counter[tuple[str, ...]] = Counter()
    for s in sents:
        p = ["<s>", *s, "</s>"]
        for i in range(len(p)):
            for n in (1, 2, 3):
                if i - n + 1 >= 0:
                    expected[tuple(p[i - n + 1:i + 1])] += 1
    got: Counter[tuple[str, ...]] = Counter()
    ids: list[list[tuple[str, ...]]] = [[(w,) for w in vocab.words]]
    for n in (2, 3):
        t = tables[n - 1]
        grams = [(vocab.words[f], *ids[n - 2][s]) for s, f in zip(t.suffix, t.first, strict=True)]
        ids.append(grams)
        got.update(dict(zip(grams, t.count.tolist(), strict=True)))
    got.update({(w,): int(c) for w, c in zip(vocab.words, tables[0].count, strict=True) if c})
    assert got == expected


def test_closed_vocabulary_leaves_oov_out() -> None:
    sents = [["a", "b"], ["b", "a"]]
    model = NGramModel(2, "wb", closed_vocab=True).fit(sents)
    ref = ReferenceModel(sents, 2, "wb", closed=True)
    probe = [["a", "q", "b"]]
    # the OOV word is skipped, and the word after it is scored from a history it breaks
    assert model.logprob(probe)[0] == pytest.approx(ref.sentence_logprob(probe[0]), abs=1e-12)
    # a closed-vocabulary model never predicts <unk> (README: left out of every count and
    # score), though the id stays reserved: log P = log 0
    assert "<unk>" in model.vocab_.words
    assert model.logprob_ngrams([["a", "<unk>"]])[0] == -math.inf


def test_unknown_method_message() -> None:
    # wording fixed by the project's style guide
    with pytest.raises(UsageError, match=r"^unknown method 'kneser'; expected one of "
                                         r"mkn, kn, wb, abs, addk, mle$"):
        NGramModel(3, "kneser").fit([["a"]])


def test_vocabulary_options() -> None:
    # counted by hand: a 3 times, b 2, c 1; ids 0-2 are <s>, </s>, <unk>, then words most
    # frequent first (the order rescore.lm.vocab documents)
    sents = [["a", "a", "b", "c"], ["a", "b"]]
    assert NGramModel(2, min_count=2).fit(sents).vocab_.words[3:] == ("a", "b")
    assert NGramModel(2, max_vocab=1).fit(sents).vocab_.words[3:] == ("a",)
    fixed = NGramModel(2, vocab=["c", "z"]).fit(sents)
    assert fixed.vocab_.words[3:] == ("c", "z")  # a given vocabulary keeps its own order
    assert fixed.metadata["training_oov"] == 5  # three "a" and two "b" (counted by hand)


def test_token_logprobs_sum_to_sentence_logprob() -> None:
    sents = [["a", "b"], ["b", "a", "c"]]
    model = NGramModel(3).fit(sents)
    per_token = model.token_logprobs(sents)
    # each word and </s> is predicted, <s> never (the contract's token count): 2+1 and 3+1
    assert [len(t) for t in per_token] == [3, 4]
    # chain rule: log P(sentence) is the sum of its tokens' conditional log probabilities
    np.testing.assert_allclose([t.sum() for t in per_token], model.logprob(sents))


@pytest.mark.parametrize("method", ALL_METHODS)
@settings(max_examples=15, deadline=None, suppress_health_check=[HealthCheck.too_slow])
@given(sents=corpora, order=st.integers(2, 4), data=st.data())
def test_cutoffs_match_reference(
    method: str, sents: list[list[str]], order: int, data: st.DataObject
) -> None:
    # a dropped n-gram's own share moves to its context's lower-order weight
    cutoffs = data.draw(st.lists(st.integers(1, 3), min_size=order - 1, max_size=order - 1))
    model = NGramModel(order, method, cutoffs=cutoffs).fit(sents)
    ref = ReferenceModel(sents, order, method, cutoffs=cutoffs)
    words = [w for w in model.vocab_.words if w != "<s>"]
    for h in sorted(ref.histories()):
        got = np.exp(model.logprob_ngrams([[*h, w] for w in words]))
        np.testing.assert_allclose(got, [ref.prob(w, h) for w in words], atol=NORM_TOL)
        assert abs(got.sum() - 1.0) < NORM_TOL


@pytest.mark.parametrize("method", ["mkn", "kn", "wb", "abs"])
@pytest.mark.parametrize("threshold", [1e-4, 1e-2, 0.5])
def test_entropy_pruning_stays_normalised(method: str, threshold: float) -> None:
    rng = np.random.default_rng(3)
    sents = [["abcdef"[j] for j in rng.integers(0, 6, rng.integers(1, 9))] for _ in range(60)]
    full = NGramModel(3, method).fit(sents)
    pruned = NGramModel(3, method, prune=threshold).fit(sents)
    # something is pruned at each threshold (observed: 60 short sentences over 6 letters
    # leave many trigrams seen once, whose removal barely changes perplexity)
    assert sum(pruned.n_ngrams_[1:]) < sum(full.n_ngrams_[1:])
    ref = ReferenceModel(sents, 3, method)
    # Stolcke (1998) recomputes the back-off weights so that every context still sums to one
    # (the definition of a conditional distribution)
    for total in _context_sums(pruned, ref.histories()):
        assert abs(total - 1.0) < NORM_TOL
    # a kept n-gram keeps its probability (Stolcke's pruning changes only back-off weights)
    words = pruned.vocab_.words
    for k in (2, 3):
        kept = [[words[i] for i in row] for row in pruned.tables_.words_of(k).tolist()]
        if kept:
            np.testing.assert_allclose(pruned.logprob_ngrams(kept), full.logprob_ngrams(kept),
                                       atol=1e-12)


def test_pruning_larger_threshold_prunes_more() -> None:
    # Stolcke (1998) compares each n-gram's relative perplexity increase, computed from the
    # unpruned model, with the threshold, so a larger threshold never keeps more (derivation);
    # 1e-6 against 1e-1 must differ on this corpus (observed)
    rng = np.random.default_rng(5)
    sents = [["abcdefgh"[j] for j in rng.integers(0, 8, rng.integers(1, 9))] for _ in range(80)]
    sizes = [sum(NGramModel(3, prune=t).fit(sents).n_ngrams_[1:]) for t in (1e-6, 1e-3, 1e-1)]
    assert sizes[0] >= sizes[1] >= sizes[2] and sizes[0] > sizes[2]


def _zipf_corpus(seed: int, n: int, v: int, exponent: float) -> list[list[str]]:
    """Words drawn with P(rank r) ~ 1/r^exponent (Zipf's law for word frequencies, from
    memory), sentences of 1 to 11 words: the counts-of-counts of real text in miniature."""
    rng = np.random.default_rng(seed)
    p = 1.0 / np.arange(1, v + 1) ** exponent
    return [[f"w{j}" for j in rng.choice(v, rng.integers(1, 12), p=p / p.sum())]
            for _ in range(n)]


@pytest.mark.parametrize("order", [3, 4])
@pytest.mark.parametrize("seed", [0, 2])
def test_modified_kneser_ney_three_discounts_match_reference(order: int, seed: int) -> None:
    # Chen and Goodman (1998): D1 = 1 - 2Y n2/n1, D2 = 2 - 3Y n3/n2, D3+ = 3 - 4Y n4/n3 with
    # Y = n1/(n1 + 2 n2), one per order; the random corpora of the tests above mostly hit
    # the single-discount fallback, so this corpus is big enough that no order does
    sents = _zipf_corpus(seed, 400, 100, 1.2)
    model = NGramModel(order, "mkn").fit(sents)
    ref = ReferenceModel(sents, order, "mkn")
    meta = model.metadata
    assert meta["fallbacks"] == {}
    assert sorted(meta["discounts"]) == [str(k) for k in range(1, order + 1)]
    for k in range(1, order + 1):
        d = meta["discounts"][str(k)]
        assert len(set(d)) == 3  # three different discounts, not one repeated
        np.testing.assert_allclose(d, ref.d[k], rtol=0, atol=1e-11)  # rounded to 12 places
    rng = np.random.default_rng(1)
    by_length: dict[int, list[tuple[str, ...]]] = {}
    for h in sorted(ref.histories()):
        by_length.setdefault(len(h), []).append(h)
    words = [w for w in model.vocab_.words if w != "<s>"] + ["zzz-unseen"]
    for group in by_length.values():
        for i in rng.choice(len(group), min(25, len(group)), replace=False):
            h = group[i]
            got = np.exp(model.logprob_ngrams([[*h, w] for w in words]))
            np.testing.assert_allclose(got, [ref.prob(w, h) for w in words], rtol=0,
                                       atol=NORM_TOL)
            assert abs(got[:-1].sum() - 1.0) < NORM_TOL  # zzz-unseen repeats <unk>
    probe = sents[:100]
    np.testing.assert_allclose(model.logprob(probe), [ref.sentence_logprob(s) for s in probe],
                               rtol=1e-9, atol=NORM_TOL)
