"""Minimum-risk choice, consensus and the confidences of chosen words."""

from __future__ import annotations

import itertools
import math

import numpy as np
import pytest

from rescore.decode.choice import decide, word_posteriors
from rescore.decode.network import EMPTY, build_network
from rescore.decode.risk import expected_errors
from rescore.decode.words import Codebook
from rescore.wer import word_errors

TOL = 1e-12


def _split(texts: list[str]) -> list[list[str]]:
    return [t.split() for t in texts]


def plain_min_risk(hyps: list[list[str]], post: list[float]) -> int:
    """The slow, obvious version: sum_g p(g) * edit distance, lowest first."""
    risks = [sum(p * word_errors(h, g) for g, p in zip(hyps, post, strict=True)) for h in hyps]
    return risks.index(min(risks))


def test_min_risk_differs_from_map_on_hand_list() -> None:
    # Stolcke, Konig and Weintraub 1997: the expected-word-error choice need not be the
    # most probable hypothesis. Worked by hand, d = word edit distance:
    #   h1 "a b c" p=.4, h2 "a x c" p=.3, h3 "a x d" p=.3
    #   d(h1,h2)=1, d(h1,h3)=2, d(h2,h3)=1
    #   R(h1) = .3*1 + .3*2 = .9;  R(h2) = .4*1 + .3*1 = .7;  R(h3) = .4*2 + .3*1 = 1.1
    # MAP picks h1, minimum risk picks h2.
    hyps = _split(["a b c", "a x c", "a x d"])
    totals = np.log([0.4, 0.3, 0.3])  # at scale 1 the posteriors are exactly .4 .3 .3
    offsets = np.array([0, 3])
    book = Codebook()
    risk = expected_errors(book.encode_many(hyps), np.array([0.4, 0.3, 0.3]))
    np.testing.assert_allclose(risk, [0.9, 0.7, 1.1], rtol=1e-12)
    assert decide(hyps, offsets, totals, scale=1.0, rule="best").rows.tolist() == [0]
    chosen = decide(hyps, offsets, totals, scale=1.0, rule="min-risk")
    assert chosen.rows.tolist() == [1]
    assert chosen.texts() == ["a x c"]
    # confidences of "a x c": "a" is held by all (1.0), "x" by h2 and h3 (.6), "c" by
    # h1 and h2 aligned on it (.7)
    np.testing.assert_allclose(chosen.confidences[0], [1.0, 0.6, 0.7], rtol=1e-12)


def test_min_risk_matches_plain_loop_on_random_lists() -> None:
    # reference: the plain-Python risk above (rapidfuzz edit distances one pair at a time)
    rng = np.random.default_rng(5)
    vocab = [f"w{i}" for i in range(6)]
    hyps: list[list[str]] = []
    sizes = rng.integers(1, 9, size=50)
    for _ in range(int(sizes.sum())):
        hyps.append([vocab[k] for k in rng.integers(0, 6, size=rng.integers(0, 7))])
    offsets = np.concatenate([[0], np.cumsum(sizes)])
    totals = rng.normal(0.0, 1.0, size=len(hyps))
    got = decide(hyps, offsets, totals, scale=1.3, rule="min-risk").rows
    for u, (a, b) in enumerate(itertools.pairwise(offsets)):
        p = np.exp(1.3 * totals[a:b])
        p /= p.sum()
        want = plain_min_risk(hyps[a:b], p.tolist())
        # equal risks up to rounding may order either way; compare the risks instead
        mine = sum(q * word_errors(hyps[got[u]], g) for g, q in zip(hyps[a:b], p, strict=True))
        best = sum(q * word_errors(hyps[a + want], g)
                   for g, q in zip(hyps[a:b], p, strict=True))
        assert mine == pytest.approx(best, abs=1e-9)


# Consensus, worked by hand (our example; construction of Mangu, Brill and Stolcke 2000
# simplified to alignments against the pivot, see rescore/decode/network.py):
#   h1 "a cat sat"        p=.4  (the pivot: highest posterior)
#   h2 "the bat sat down" p=.3  against h1: a->the, cat->bat, sat=sat, +down (3 edits, the
#                               only 3-edit alignment: "sat" is the only common word)
#   h3 "the cat"          p=.3  against h1: a->the, cat=cat, -sat (the only 2-edit one)
# bins: slot "a": a .4, the .3+.3=.6           -> the (.6)
#       slot "cat": cat .4+.3=.7, bat .3        -> cat (.7)
#       slot "sat": sat .4+.3=.7, empty .3      -> sat (.7)
#       gap after "sat": down .3, empty .7      -> empty, left out
# consensus "the cat sat", which no hypothesis of the list holds.
CONSENSUS_HYPS = ["a cat sat", "the bat sat down", "the cat"]
CONSENSUS_POST = [0.4, 0.3, 0.3]


def test_consensus_on_hand_worked_three_hypotheses() -> None:
    hyps = _split(CONSENSUS_HYPS)
    totals = np.log(CONSENSUS_POST)
    got = decide(hyps, np.array([0, 3]), totals, scale=1.0, rule="consensus")
    assert got.texts() == ["the cat sat"]
    assert "the cat sat" not in CONSENSUS_HYPS
    np.testing.assert_allclose(got.confidences[0], [0.6, 0.7, 0.7], rtol=1e-12)
    assert got.rows.tolist() == [-1]
    pairs = got.word_confidences(0)
    assert [w for w, _ in pairs] == ["the", "cat", "sat"]
    assert [c for _, c in pairs] == pytest.approx([0.6, 0.7, 0.7], abs=1e-12)


def test_confusion_network_bins_on_hand_example() -> None:
    net = build_network(_split(CONSENSUS_HYPS), np.array(CONSENSUS_POST))
    assert net.slot == (True, True, True, False)
    want = [{"a": 0.4, "the": 0.6}, {"cat": 0.7, "bat": 0.3},
            {"sat": 0.7, EMPTY: 0.3}, {EMPTY: 0.7, "down": 0.3}]
    for got, expect in zip(net.bins, want, strict=True):
        assert got.keys() == expect.keys()
        for word, mass in expect.items():
            assert got[word] == pytest.approx(mass, abs=TOL)


def test_word_posteriors_of_the_pivot_on_hand_example() -> None:
    # "a cat sat": "a" only h1 (.4); "cat" h1 and h3 match it (.7); "sat" h1 and h2 (.7)
    book = Codebook()
    codes = book.encode_many(_split(CONSENSUS_HYPS))
    got = word_posteriors(codes, np.array(CONSENSUS_POST), 0)
    np.testing.assert_allclose(got, [0.4, 0.7, 0.7], rtol=1e-12)


def test_every_bin_holds_the_whole_mass_on_random_lists() -> None:
    # property of any confusion network: each bin's word posteriors, the empty word
    # included, sum to the list's total mass (1)
    rng = np.random.default_rng(8)
    vocab = [f"w{i}" for i in range(5)]
    for _ in range(30):
        n = int(rng.integers(1, 8))
        hyps = [[vocab[k] for k in rng.integers(0, 5, size=rng.integers(0, 6))]
                for _ in range(n)]
        post = rng.dirichlet(np.ones(n))
        for b in build_network(hyps, post).bins:
            assert sum(b.values()) == pytest.approx(1.0, abs=1e-9)
            assert min(b.values()) >= -1e-12


def test_single_hypothesis_lists_output_themselves_with_full_confidence() -> None:
    # a list of one: posterior 1, every rule outputs it, every word has confidence 1
    hyps = _split(["go north", "", "stop"])
    for rule in ("best", "min-risk", "consensus"):
        got = decide(hyps, np.array([0, 1, 2, 3]), np.zeros(3), scale=1.0, rule=rule)
        assert got.texts() == ["go north", "", "stop"]
        assert [list(c) for c in got.confidences] == [[1.0, 1.0], [], [1.0]]


def test_unknown_rule_is_refused() -> None:
    with pytest.raises(ValueError, match="expected one of best, min-risk, consensus"):
        decide([["a"]], np.array([0, 1]), np.zeros(1), scale=1.0, rule="vote")  # type: ignore[arg-type]


def test_best_rule_keeps_the_top_score_and_earliest_tie() -> None:
    # the contract: the best hypothesis has the highest total; ties go to the earlier one
    hyps = _split(["x", "y", "z"])
    got = decide(hyps, np.array([0, 3]), np.array([1.0, 2.0, 2.0]), scale=1.0, rule="best")
    assert got.rows.tolist() == [1]
    # "y" is held by h2 alone: its posterior e^2 / (e^1 + 2 e^2)
    want = math.exp(2) / (math.exp(1) + 2 * math.exp(2))
    assert got.confidences[0][0] == pytest.approx(want, rel=1e-12)


def test_insertions_go_to_the_gap_before_the_next_pivot_word() -> None:
    # by hand: pivot "a b" (p=.6); "a x y b" (p=.4) inserts x and y between a and b:
    # slot a {a: 1}, gap bins {x: .4, empty: .6} and {y: .4, empty: .6}, slot b {b: 1}
    net = build_network(_split(["a b", "a x y b"]), np.array([0.6, 0.4]))
    assert net.slot == (True, False, False, True)
    assert net.bins[1] == pytest.approx({EMPTY: 0.6, "x": 0.4})
    assert net.bins[2] == pytest.approx({EMPTY: 0.6, "y": 0.4})
    assert net.bins[0] == pytest.approx({"a": 1.0}) and net.bins[3] == pytest.approx({"b": 1.0})
    # with the inserting hypothesis heavier, it is the pivot and the others' gap is a
    # deletion: "a x y b" (p=.6) against "a b" (p=.4): slots x and y {word: .6, empty: .4}
    got = decide(_split(["a b", "a x y b"]), np.array([0, 2]), np.log([0.4, 0.6]),
                 scale=1.0, rule="consensus")
    assert got.texts() == ["a x y b"]
    np.testing.assert_allclose(got.confidences[0], [1.0, 0.6, 0.6, 1.0], rtol=1e-12)


def test_consensus_agrees_with_the_full_network_on_random_lists() -> None:
    # the fast path spells out only the winners; it must give build_network(...).best()
    rng = np.random.default_rng(12)
    vocab = [f"w{i}" for i in range(5)]
    for _ in range(30):
        n = int(rng.integers(1, 8))
        hyps = [[vocab[k] for k in rng.integers(0, 5, size=rng.integers(0, 6))]
                for _ in range(n)]
        totals = rng.normal(size=n)
        got = decide(hyps, np.array([0, n]), totals, scale=1.0, rule="consensus")
        post = np.exp(totals - totals.max())
        words, conf = build_network(hyps, post / post.sum()).best()
        assert list(got.words[0]) == words
        np.testing.assert_allclose(got.confidences[0], conf, rtol=1e-9)
