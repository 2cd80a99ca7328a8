"""Significance tests against published formulas, SciPy, brute force and simulation."""

from __future__ import annotations

import itertools

import numpy as np
import numpy.typing as npt
import pytest
import scipy.stats

from rescore.errors import InputError
from rescore.significance import (
    binomial_two_sided,
    matched_pairs,
    matched_pairs_statistic,
    mid_ranks,
    paired_bootstrap,
    segment_errors,
    sign_test,
    table_resamples,
    wer_intervals,
    wilcoxon_signed_rank,
    with_interval,
)
from rescore.wer import UtteranceCounts, align, wer_from_totals


def w(text: str) -> list[str]:
    """Words of a space-separated string."""
    return text.split()

P_TOL = 1e-9


# --- matched pairs -------------------------------------------------------------------------

def test_matched_pairs_worked_example() -> None:
    # source: Gillick and Cox (1989) statistic W = mean / (sd / sqrt(n)) with the sample
    # variance: Z = (2, -1, -1, 1) has mean 0.25, variance 2.25 (sum of squared deviations
    # 6.75 over n - 1 = 3), W = 0.25 / (1.5 / 2) = 0.3333, two-sided normal p = 0.739
    r = matched_pairs_statistic([2, -1, -1, 1])
    assert r.mean == pytest.approx(0.25)
    assert r.variance == pytest.approx(2.25)
    assert r.z == pytest.approx(1 / 3)
    assert r.p_value == pytest.approx(0.739, abs=5e-4)
    # the normal tail agrees with SciPy
    assert r.p_value == pytest.approx(2 * scipy.stats.norm.sf(1 / 3), abs=P_TOL)
    assert (r.method, r.note) == ("normal", "")


# W = mean / (sd / sqrt(n)) is undefined with fewer than two segments or zero variance
DEGENERATE_SEGMENTS = [
    [-1, -1],          # every segment better by one error: the old code said p = 0
    [2, 2, 2],         # every segment worse by two
    [-1] * 15,         # fifteen agreeing segments: p = 2 * 0.5**15, below 0.0001
    [0, 0, 0],         # segments where both erred alike: no evidence
    [-3],              # one segment
    [],                # no error-bearing segment at all
]


@pytest.mark.parametrize("d", DEGENERATE_SEGMENTS)
def test_matched_pairs_without_variance_uses_exact_sign_test(d: list[int]) -> None:
    # source: scipy.stats.binomtest(k, n, 0.5), two-sided, over the non-zero segment
    # differences (the distribution-free test of "a segment favours either system alike");
    # with no non-zero difference there is no evidence and p = 1 (definition)
    r = matched_pairs_statistic(d)
    nonzero = [x for x in d if x != 0]
    expected = (1.0 if not nonzero else
                scipy.stats.binomtest(sum(x < 0 for x in nonzero), len(nonzero), 0.5).pvalue)
    assert r.p_value == pytest.approx(expected, rel=1e-12)
    # derived by hand: k equal non-zero differences give min(1, 2 * 0.5**k)
    if nonzero and len(set(nonzero)) == 1:
        assert r.p_value == pytest.approx(min(1.0, 2 * 0.5 ** len(nonzero)), rel=1e-12)
    assert (r.method, r.z, r.segments) == ("sign", None, len(d))
    assert "sign test" in r.note


def test_matched_pairs_more_agreeing_segments_never_weaken_the_evidence() -> None:
    # one segment gave p = 1 and two identical ones p = 0: adding a segment that agrees
    # must never raise p, and agreeing segments can never reach p = 0 (definition of a
    # two-sided p-value of a discrete test: at least the probability of the observed sign
    # pattern and its mirror, 2 * 0.5**n)
    ps = [matched_pairs_statistic([-1] * n).p_value for n in range(1, 12)]
    assert ps == sorted(ps, reverse=True)
    assert ps[1] == 0.5 and min(ps) > 0


def test_matched_pairs_over_alignments_with_equal_segment_changes() -> None:
    # derived by hand: two utterances, each with one segment where after fixes the one
    # error before made; differences (-1, -1), zero variance, exact sign test p = 0.5
    ref = w("vent bay three opened")
    before = [align(ref, w("went bay three opened")), align(ref, w("vent day three opened"))]
    after = [align(ref, ref), align(ref, ref)]
    r = matched_pairs(before, after)
    assert (r.segments, r.mean, r.method, r.p_value) == (2, -1.0, "sign", 0.5)


def test_segments_are_bounded_by_words_both_systems_get_right() -> None:
    # derived by hand, min_run = 2: reference a b c d e f g h
    # before: a X c d e f G' h  -> errors at b and g
    # after:  a b c d Y f g h   -> error at e
    # both right: a, c d, f, h; runs of >= 2 with no insertions between: "c d" only, so the
    # segments are [a b] (before 1, after 0) and [e f g h] (before 1, after 1)
    ref = w("a b c d e f g h")
    before = align(ref, w("a x c d e f z h"))
    after = align(ref, w("a b c d y f g h"))
    assert segment_errors(before, after, min_run=2) == [(1, 0), (1, 1)]
    # with single-word anchors every both-right word bounds a segment
    assert segment_errors(before, after, min_run=1) == [(1, 0), (0, 1), (1, 0)]


def test_insertion_between_anchor_words_forms_its_own_segment() -> None:
    # derived by hand: "on" inserted by after between "b" and "c" breaks the run a b | c d
    ref = w("a b c d")
    before = align(ref, ref)
    after = align(ref, w("a b on c d"))
    assert segment_errors(before, after, min_run=2) == [(0, 1)]


def test_identical_systems_have_no_evidence() -> None:
    # definition: every segment difference is zero, so W = 0 and p = 1
    ref = w("vent bay three opened")
    al = [align(ref, w("went bay three opened"))] * 3
    r = matched_pairs(al, al)
    assert r.segments == 3 and r.p_value == 1.0


# --- sign test -----------------------------------------------------------------------------

SIGN_CASES = [
    [-1, -2, -1, 0, 1, -3, 0, -1],          # zeros are dropped
    [1, 1, 1, 1, 1, 1],                       # all worse
    [-1, 1, -1, 1],                           # balanced: p = 1
    [0, 0, 0],                                # no evidence at all
    [],                                       # no utterances
    [1],                                      # one non-zero difference: p = 1
    [-1, -1],                                 # two alike: p = 0.5
    list(np.random.default_rng(3).integers(-2, 3, size=400)),  # large n
]


@pytest.mark.parametrize("d", SIGN_CASES)
def test_sign_test_matches_scipy_binomtest(d: list[int]) -> None:
    # source: scipy.stats.binomtest(k, n, 0.5), two-sided, on the non-zero differences
    r = sign_test(d)
    n = r.improved + r.worsened
    expected = 1.0 if n == 0 else scipy.stats.binomtest(r.improved, n, 0.5).pvalue
    assert r.p_value == pytest.approx(expected, rel=1e-9, abs=1e-300)
    assert r.ties == sum(1 for x in d if x == 0)


def test_binomial_exact_small_case() -> None:
    # derived by hand: 0 of 5 heads, two-sided = 2 * (1/32) = 0.0625
    assert binomial_two_sided(0, 5) == 0.0625


# --- Wilcoxon signed-rank ------------------------------------------------------------------

def brute_force_wilcoxon_p(d: list[int]) -> float:
    """All 2**n sign flips of the non-zero differences' mid-ranks (slow, obviously exact)."""
    nz = [x for x in d if x != 0]
    ranks = mid_ranks(np.abs(nz))
    observed = float(ranks[np.array(nz) > 0].sum())
    sums = [float(np.dot(signs, ranks)) for signs in itertools.product([0, 1], repeat=len(nz))]
    lo = sum(s <= observed + 1e-9 for s in sums) / len(sums)
    hi = sum(s >= observed - 1e-9 for s in sums) / len(sums)
    return min(1.0, 2 * min(lo, hi))


RNG = np.random.default_rng(11)
# SciPy's "auto" method (scipy.stats.wilcoxon, zero_method="wilcox", correction=False):
# exact distribution for n <= 50 without ties or zeros; an exhaustive sign-flip permutation
# for n <= 13 with ties or zeros; the normal approximation with tie correction above 50.
# Our rule (exact sign-flip over mid-ranks up to 50 non-zero differences, normal above)
# coincides with it in each of these cases.
SCIPY_CASES = [
    [3, -1, 4, -5, 9, 2, 6, -8, 7, 10, -11, 12],                       # exact, no ties
    list(RNG.permutation(np.arange(1, 41) * RNG.choice([-1, 1], 40))),  # exact, n = 40
    [1, -1, 2, 0, 2, -3, 1, 0, 1, 2],                                  # ties and zeros, n <= 13
    [-2, -2, -1, -1, -1, 1, -3],                                       # ties
    list(RNG.integers(-3, 4, size=300)),                               # normal, ties and zeros
    list(RNG.integers(-1, 3, size=120)),                               # normal, one-sided drift
]


@pytest.mark.parametrize("d", SCIPY_CASES)
def test_wilcoxon_matches_scipy(d: list[int]) -> None:
    ours = wilcoxon_signed_rank(d)
    ref = scipy.stats.wilcoxon(d)
    assert ours.statistic == pytest.approx(float(ref.statistic))
    assert ours.p_value == pytest.approx(float(ref.pvalue), rel=1e-7)


@pytest.mark.parametrize("seed", [1, 2, 3])
def test_wilcoxon_exact_with_ties_matches_brute_force(seed: int) -> None:
    # 13 < n <= 50 with ties: SciPy switches to the normal approximation here, we stay exact;
    # checked against enumerating every sign flip (source: definition of the permutation
    # distribution of the signed-rank statistic)
    d = list(np.random.default_rng(seed).integers(-3, 4, size=16))
    assert wilcoxon_signed_rank(d).p_value == pytest.approx(brute_force_wilcoxon_p(d),
                                                             abs=P_TOL)


@pytest.mark.parametrize("d", [[0, 0, 0, 0], []])
def test_wilcoxon_no_nonzero_difference(d: list[int]) -> None:
    # definition: no non-zero difference (or no utterance at all), no evidence: p = 1, and
    # the result says no test distribution was used
    r = wilcoxon_signed_rank(d)
    assert (r.n, r.zeros, r.p_value, r.method) == (0, len(d), 1.0, "none")


@pytest.mark.parametrize("d", [[1], [-3], [-1, -1], [2, 2, 2], [0, 0, -1]])
def test_wilcoxon_tiny_and_constant_samples_match_scipy(d: list[int]) -> None:
    # source: scipy.stats.wilcoxon (zero_method="wilcox"): one non-zero difference gives
    # p = 1; n equal ones give the single extreme sign pattern and its mirror, 2 * 0.5**n
    ours = wilcoxon_signed_rank(d)
    ref = scipy.stats.wilcoxon(d)
    assert ours.p_value == pytest.approx(float(ref.pvalue), rel=1e-12)
    assert ours.statistic == pytest.approx(float(ref.statistic))


def test_mid_ranks_match_scipy_rankdata() -> None:
    # source: scipy.stats.rankdata(method="average")
    x = [3, 1, 4, 1, 5, 9, 2, 6, 5, 3, 5]
    assert mid_ranks(x).tolist() == scipy.stats.rankdata(x).tolist()


# --- paired bootstrap ----------------------------------------------------------------------

def test_bootstrap_identical_systems_give_zero_difference() -> None:
    # definition: the same errors on both sides give difference 0 in every resample
    e = np.array([0, 2, 1, 3, 0, 1])
    r = paired_bootstrap(e, e, [5, 6, 4, 7, 3, 5], resamples=500, seed=4)
    assert r.difference == 0.0
    assert r.difference_ci == (0.0, 0.0)
    assert r.probability_of_improvement == 0.0


@pytest.mark.parametrize(("before", "after", "improvement"), [([3], [1], 1.0), ([2], [2], 0.0),
                                                             ([0], [1], 0.0)])
def test_bootstrap_single_utterance_has_zero_width(before: list[int], after: list[int],
                                                   improvement: float) -> None:
    # definition: resampling one utterance always draws that utterance, so every resample
    # equals the point estimate and the probability of improvement is 0 or 1
    r = paired_bootstrap(before, after, [5], resamples=200, seed=1)
    assert r.before_ci == (before[0] / 5, before[0] / 5)
    assert r.difference_ci == pytest.approx((r.difference, r.difference), abs=P_TOL)
    assert r.probability_of_improvement == improvement


def test_bootstrap_refuses_no_utterances_and_no_words() -> None:
    # definition: WER needs at least one reference word
    with pytest.raises(InputError, match="no utterances"):
        paired_bootstrap([], [], [])
    with pytest.raises(InputError, match="no words"):
        paired_bootstrap([1], [0], [0])


def _two_systems(seed: int, size: int, low: int, high: int, p_before: float, p_after: float
                 ) -> tuple[npt.NDArray[np.int64], npt.NDArray[np.int64], npt.NDArray[np.int64]]:
    """Invented per-utterance counts: reference words, and binomial errors of two systems."""
    rng = np.random.default_rng(seed)
    words = rng.integers(low, high, size=size)
    return words, rng.binomial(words, p_before), rng.binomial(words, p_after)


def test_bootstrap_interval_contains_point_and_is_reproducible() -> None:
    n_ref, before, after = _two_systems(5, 200, 3, 15, 0.2, 0.15)
    a = paired_bootstrap(before, after, n_ref, resamples=2000, seed=9)
    b = paired_bootstrap(before, after, n_ref, resamples=2000, seed=9)
    c = paired_bootstrap(before, after, n_ref, resamples=2000, seed=10)
    assert a == b
    assert a != c
    for (lo, hi), point in ((a.before_ci, a.before_wer), (a.after_ci, a.after_wer),
                            (a.difference_ci, a.difference)):
        assert lo <= point <= hi
    # definition of corpus WER: total errors / total reference words
    assert a.before_wer == before.sum() / n_ref.sum()


def test_bootstrap_matches_plain_loop() -> None:
    # the slow version: the same index draws, one resample at a time, in plain Python
    before, after, words = [1, 0, 3, 2, 0], [0, 0, 2, 2, 1], [4, 3, 6, 5, 2]
    r = paired_bootstrap(before, after, words, resamples=300, seed=2)
    idx = np.random.default_rng(2).integers(0, 5, size=(300, 5))
    diffs = []
    wins = 0
    for row in idx.tolist():
        n = sum(words[i] for i in row)
        d = (sum(after[i] for i in row) - sum(before[i] for i in row)) / n
        diffs.append(d)
        wins += d < 0
    assert r.probability_of_improvement == wins / 300
    assert r.difference_ci == pytest.approx(tuple(np.quantile(diffs, [0.025, 0.975])))


def test_bootstrap_coverage_near_nominal() -> None:
    # simulation with known truth: word errors independent with rate 0.15 (before) and
    # 0.12 (after, sharing the same draws, so the pair is correlated as real systems are);
    # a 95% interval should cover the truth in about 95% of experiments. Percentile
    # intervals at 80 utterances run slightly narrow (common practice: accept 0.90-0.99).
    rng = np.random.default_rng(2024)
    experiments, utterances, words = 200, 80, 10
    covered_wer = covered_diff = 0
    for k in range(experiments):
        u = rng.random((utterances, words))
        before = (u < 0.15).sum(axis=1)
        after = (u < 0.12).sum(axis=1)
        r = paired_bootstrap(before, after, np.full(utterances, words), resamples=400, seed=k)
        covered_wer += r.before_ci[0] <= 0.15 <= r.before_ci[1]
        covered_diff += r.difference_ci[0] <= -0.03 <= r.difference_ci[1]
    assert 0.90 <= covered_wer / experiments <= 0.99
    assert 0.90 <= covered_diff / experiments <= 0.99


# --- the intervals printed beside a command's WER table ----------------------------------

def test_wer_intervals_are_the_paired_bootstraps_own_intervals() -> None:
    # the same draws by design: a command's table and the report give one interval
    words, before, after = _two_systems(3, 400, 1, 30, 0.2, 0.1)
    paired = paired_bootstrap(before, after, words, resamples=2000, seed=5)
    found = wer_intervals([before, after], words, resamples=2000, seed=5)
    assert found.intervals == (paired.before_ci, paired.after_ci)
    alone = wer_intervals([after], words, resamples=2000, seed=5)  # rows do not interact
    assert alone.intervals == (paired.after_ci,)


def test_wer_interval_agrees_with_scipy_percentile_bootstrap() -> None:
    # source: scipy.stats.bootstrap(method="percentile", paired=True) resampling utterances
    # (the pairs of errors and reference words) for the ratio of sums. Different random
    # draws, so they agree to Monte Carlo error: with 10,000 resamples the 2.5 % quantile of
    # a WER whose spread is about 0.01 moves by about 0.0003 (binomial error of a quantile;
    # from memory), and 0.002 is well outside that. Errors cluster by utterance here, so a
    # bootstrap over words instead of utterances would be well under half as wide and fail.
    rng = np.random.default_rng(11)
    words = rng.integers(2, 25, size=500)
    bad = rng.random(500) < 0.15  # a few utterances carry most errors
    errors = np.where(bad, rng.binomial(words, 0.7), rng.binomial(words, 0.05))
    ours = wer_intervals([errors], words, resamples=10_000, seed=0).intervals[0]
    theirs = scipy.stats.bootstrap(
        (errors, words), lambda e, w, axis=-1: e.sum(axis=axis) / w.sum(axis=axis),
        paired=True, vectorized=True, method="percentile", n_resamples=10_000,
        confidence_level=0.95, random_state=np.random.default_rng(1)).confidence_interval
    assert ours[0] == pytest.approx(theirs.low, abs=0.002)
    assert ours[1] == pytest.approx(theirs.high, abs=0.002)
    assert ours[1] - ours[0] > 0.02  # a real width, not a degenerate one


def test_table_resamples_fall_with_size_but_not_below_a_thousand() -> None:
    assert table_resamples(500) == 10_000
    assert table_resamples(1_000_000) == 1_000
    assert 1_000 <= table_resamples(50_000) < 10_000


def test_with_interval_leaves_an_undefined_wer_alone_and_to_dict_unchanged() -> None:
    none = np.zeros(2, dtype=np.int64)
    empty = UtteranceCounts(none, none, none, none)  # two utterances, no words
    assert with_interval(empty).interval is None
    # one substitution in the first of two 2-word references: 1 error in 4 words
    r = with_interval(UtteranceCounts(np.array([1, 0]), none, none, np.array([1, 2])))
    assert r.wer == wer_from_totals(1, 0, 0, 3, utterances=2).wer
    assert r.interval is not None and r.interval.low <= r.wer <= r.interval.high
    # the keys of `wer --json` (the contract) carry no interval
    assert set(r.to_dict()) == {"wer", "substitutions", "deletions", "insertions", "hits",
                                "reference_words", "utterances"}


def test_bootstrap_draws_do_not_depend_on_the_chunk_size(monkeypatch: pytest.MonkeyPatch) -> None:
    # a report's figures must not move when the resamples are drawn in other chunks:
    # numpy's Generator.integers for int64 consumes its bit stream value by value
    # (numpy's random documentation: no buffered bits kept between calls for 64-bit draws)
    import rescore.significance as sg
    words, before, after = _two_systems(8, 3000, 1, 20, 0.2, 0.1)
    found = []
    for elements in (1 << 22, 1 << 18, 1 << 12):
        monkeypatch.setattr(sg, "_CHUNK_ELEMENTS", elements)
        found.append(paired_bootstrap(before, after, words, resamples=3000, seed=4))
    assert found[0] == found[1] == found[2]
