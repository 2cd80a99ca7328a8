"""Word correctness, NCE, reliability, the review curve and isotonic calibration."""

from __future__ import annotations

import math

import jiwer
import numpy as np
import pytest
from scipy.optimize import isotonic_regression

from rescore.decode.confidence import (
    IsotonicCalibration,
    nce,
    pool_adjacent_violators,
    reliability,
    review_curve,
    word_correct,
)

TOL = 1e-12


def test_word_correct_counts_jiwer_hits() -> None:
    # reference: jiwer.process_words hits are the matched words of one minimum alignment
    rng = np.random.default_rng(2)
    vocab = [f"w{i}" for i in range(5)]
    for _ in range(50):
        ref = [vocab[k] for k in rng.integers(0, 5, size=rng.integers(1, 8))]
        hyp = [vocab[k] for k in rng.integers(0, 5, size=rng.integers(1, 8))]
        got = word_correct(ref, hyp)
        assert len(got) == len(hyp)
        assert int(got.sum()) == jiwer.process_words(" ".join(ref), " ".join(hyp)).hits


def test_word_correct_marks_the_right_words() -> None:
    # by hand: "the cat sat" against output "a cat sat down": a wrong, cat and sat right,
    # down inserted
    assert word_correct(["the", "cat", "sat"], ["a", "cat", "sat", "down"]).tolist() == [
        False, True, True, False]


def test_nce_against_its_definition_by_hand() -> None:
    # NCE = (H(C) - H(C|conf)) / H(C) (NIST's word-confidence measure), worked by hand in
    # bits: confidences .9 .8 .3 .6, correct 1 1 0 1; share correct 3/4
    #   H(C) = -(3 log2 .75 + log2 .25) = 3 * 0.415037 + 2 = 3.245112
    #   H(C|conf) = -(log2 .9 + log2 .8 + log2 (1 - .3) + log2 .6)
    #             = 0.152003 + 0.321928 + 0.514573 + 0.736966 = 1.725470
    #   NCE = (3.245112 - 1.725470) / 3.245112 = 0.468287
    got = nce(np.array([0.9, 0.8, 0.3, 0.6]), np.array([1, 1, 0, 1], dtype=bool))
    assert got == pytest.approx(0.468287, abs=1e-6)


def test_nce_matches_direct_computation_on_random_words() -> None:
    # the definition written out, with natural logs (the base cancels in the ratio)
    rng = np.random.default_rng(4)
    conf = rng.uniform(0.01, 0.99, size=500)
    right = rng.uniform(size=500) < conf
    share = right.mean()
    h_c = -len(right) * (share * math.log(share) + (1 - share) * math.log(1 - share))
    h_given = -sum(math.log(c) if r else math.log(1 - c) for c, r in zip(conf, right,
                                                                         strict=True))
    assert nce(conf, right) == pytest.approx((h_c - h_given) / h_c, rel=1e-10)


def test_nce_of_the_overall_share_is_zero_and_undefined_without_errors() -> None:
    # a confidence equal to the share of correct words everywhere carries no information:
    # H(C|conf) = H(C), NCE = 0 (from the definition)
    right = np.array([1, 1, 1, 0], dtype=bool)
    assert nce(np.full(4, 0.75), right) == pytest.approx(0.0, abs=TOL)
    assert nce(np.full(3, 0.9), np.ones(3, dtype=bool)) is None


def test_reliability_bins_by_hand() -> None:
    # worked by hand, 10 bins of width .1:
    #   .05 (wrong)              -> bin 0: 1 word, mean .05, accuracy 0
    #   .15 (right), .12 (wrong) -> bin 1: 2 words, mean .135, accuracy .5
    #   .95 (right), 1.0 (right) -> bin 9 (1.0 closes the last bin): mean .975, accuracy 1
    #   ECE = (1 * .05 + 2 * |.5 - .135| + 2 * |1 - .975|) / 5 = (.05 + .73 + .05) / 5 = .166
    rel = reliability(np.array([0.05, 0.15, 0.12, 0.95, 1.0]),
                      np.array([0, 1, 0, 1, 1], dtype=bool), bins=10)
    assert rel.counts == (1, 2, 0, 0, 0, 0, 0, 0, 0, 2)
    assert rel.mean_confidence[0] == pytest.approx(0.05)
    assert rel.mean_confidence[1] == pytest.approx(0.135)
    assert rel.mean_confidence[9] == pytest.approx(0.975)
    assert rel.accuracy[0] == 0.0 and rel.accuracy[1] == 0.5 and rel.accuracy[9] == 1.0
    assert math.isnan(rel.accuracy[4])
    assert rel.to_dict()["accuracy"][4] is None
    assert rel.ece == pytest.approx(0.166, abs=1e-12)


def test_review_curve_by_hand() -> None:
    # worked by hand: confidences .9 .2 .5 .1 with correctness 1 0 1 0 (2 errors);
    # lowest first: .1 (wrong), .2 (wrong), .5, .9 -> caught 0, .5, 1, 1, 1
    curve = review_curve(np.array([0.9, 0.2, 0.5, 0.1]), np.array([1, 0, 1, 0], dtype=bool))
    np.testing.assert_allclose(curve.reviewed, [0, 0.25, 0.5, 0.75, 1.0])
    np.testing.assert_allclose(curve.caught, [0, 0.5, 1.0, 1.0, 1.0])
    assert curve.caught_at(0.125) == pytest.approx(0.25)


def test_pool_adjacent_violators_hand_case() -> None:
    # by hand: 1 3 2 4 -> the violating pair (3, 2) pools to 2.5
    np.testing.assert_allclose(pool_adjacent_violators(np.array([1.0, 3.0, 2.0, 4.0])),
                               [1, 2.5, 2.5, 4])
    # by hand, weighted: (3, w=1) then (1, w=3) pool to (3 + 3) / 4 = 1.5
    np.testing.assert_allclose(pool_adjacent_violators(np.array([3.0, 1.0]),
                                                       np.array([1.0, 3.0])), [1.5, 1.5])


def test_pool_adjacent_violators_matches_scipy() -> None:
    # reference: scipy.optimize.isotonic_regression (SciPy >= 1.12), increasing, weighted
    rng = np.random.default_rng(9)
    for _ in range(20):
        y = rng.normal(size=int(rng.integers(1, 60))).cumsum() * rng.choice([-1, 1])
        w = rng.uniform(0.1, 3.0, size=len(y))
        want = isotonic_regression(y, weights=w, increasing=True).x
        np.testing.assert_allclose(pool_adjacent_violators(y, w), want, rtol=1e-10, atol=1e-12)


def test_isotonic_calibration_fits_monotone_and_round_trips() -> None:
    # correctness drawn with probability conf**2 (so raw confidences are over-confident);
    # the fitted map must be non-decreasing, inside [0, 1], agree with scipy's isotonic
    # regression at the distinct confidences, and survive a trip through plain lists
    rng = np.random.default_rng(1)
    conf = np.round(rng.uniform(size=2000), 2)
    right = rng.uniform(size=2000) < conf**2
    cal = IsotonicCalibration.fit(conf, right)
    xs, inverse, counts = np.unique(conf, return_inverse=True, return_counts=True)
    means = np.bincount(inverse, weights=right) / counts
    want = isotonic_regression(means, weights=counts.astype(float)).x
    np.testing.assert_allclose(cal.transform(xs), want, rtol=1e-10, atol=1e-12)
    assert np.all(np.diff(cal.y) >= 0) and cal.y[0] >= 0.0 and cal.y[-1] <= 1.0
    again = IsotonicCalibration.from_dict(cal.to_dict())
    np.testing.assert_array_equal(again.transform(conf), cal.transform(conf))
    # calibrated on the same words, ECE falls and NCE rises
    assert reliability(cal.transform(conf), right).ece < reliability(conf, right).ece
    raw, fitted = nce(conf, right), nce(cal.transform(conf), right)
    assert raw is not None and fitted is not None and fitted > raw


@pytest.mark.parametrize("data", [
    {"method": "platt", "x": [0.0], "y": [0.0]},
    {"method": "isotonic", "x": [0.0, 1.0], "y": [0.5]},
    {"method": "isotonic", "x": [0.5, 0.2], "y": [0.1, 0.3]},
])
def test_calibration_from_dict_refuses_bad_maps(data: dict[str, object]) -> None:
    with pytest.raises(ValueError):
        IsotonicCalibration.from_dict(data)
