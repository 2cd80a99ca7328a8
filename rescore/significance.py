"""Is the change in WER between two systems on the same utterances real?

Four views of one paired comparison, all with differences taken as ``after - before`` (a
negative difference is an improvement):

- :func:`paired_bootstrap`: resample utterances with replacement (Bisani and Ney, 2004),
  giving percentile intervals for each corpus WER and for their difference, and the
  probability of improvement (the share of resamples in which ``after`` has the lower WER).
- :func:`matched_pairs`: the matched-pairs sentence-segment word error test (Gillick and
  Cox, 1989) over segments bounded by words both systems recognise correctly. Its normal
  statistic needs at least two segments whose differences vary; otherwise the p-value is
  the exact two-sided sign test over the non-zero segment differences, and the result says
  so in ``method`` and ``note``.
- :func:`sign_test`: exact two-sided binomial test on the signs of per-utterance error
  differences, zeros dropped.
- :func:`wilcoxon_signed_rank`: signed-rank test on the same differences; zeros dropped
  (Wilcoxon's own convention), tied magnitudes get mid-ranks. With at most ``exact_limit``
  non-zero differences the p-value comes from the exact distribution of the positive rank
  sum over all sign flips of those mid-ranks (exact with or without ties); above it, the
  normal approximation with the tie-corrected variance and no continuity correction.
"""

from __future__ import annotations

import math
from collections.abc import Callable, Sequence
from dataclasses import asdict, dataclass, replace

import numpy as np
import numpy.typing as npt

from rescore.errors import InputError
from rescore.wer import (
    UNDEFINED_WER,
    Alignment,
    UtteranceCounts,
    WerInterval,
    WerResult,
    summarise,
)

IntArray = npt.NDArray[np.int64]
# elements of one resample index matrix; rows per chunk depend only on the corpus size, so
# the same seed gives the same numbers on every machine. The draws do not depend on the
# chunk at all (numpy draws 64-bit bounded integers one after another, with no buffer
# carried between calls; tests/test_significance.py checks three chunk sizes): 2**18
# elements keep the temporaries near 10 MB, and in cache (1.5 to 1.7 x faster than 2**22
# on 20,000 to 200,000 utterances, measured; 2**22 held about 170 MB)
_CHUNK_ELEMENTS = 1 << 18


def _normal_two_sided(z: float) -> float:
    return math.erfc(abs(z) / math.sqrt(2.0))


def _count(n: int, noun: str) -> str:
    return f"{n} {noun}" + ("" if n == 1 else "s")


def _as_int_array(values: Sequence[int] | npt.ArrayLike, name: str) -> IntArray:
    arr = np.asarray(values)
    if arr.ndim != 1:
        raise ValueError(f"{name} must be one-dimensional")
    return arr.astype(np.int64)


# --- paired bootstrap ----------------------------------------------------------------------


@dataclass(frozen=True)
class BootstrapResult:
    """Percentile intervals from a paired bootstrap over utterances."""

    resamples: int
    seed: int
    confidence: float
    before_wer: float
    after_wer: float
    difference: float
    before_ci: tuple[float, float]
    after_ci: tuple[float, float]
    difference_ci: tuple[float, float]
    probability_of_improvement: float

    def to_dict(self) -> dict[str, object]:
        out = asdict(self)
        for key in ("before_ci", "after_ci", "difference_ci"):
            out[key] = list(out[key])
        return out


def _check_resampling(resamples: int, confidence: float) -> None:
    if resamples < 1:
        raise InputError(f"resamples must be at least 1, got {resamples}", field="resamples")
    if not 0.0 < confidence < 1.0:
        raise InputError(f"confidence must lie strictly between 0 and 1, got {confidence}",
                         field="confidence")


def _resampled_sums(stacked: IntArray, resamples: int, seed: int,
                    progress: Callable[[int], None] | None = None) -> IntArray:
    """Rows of per-utterance counts summed over each resample of the utterances (``n``
    indices drawn with replacement; one index matrix per chunk of resamples): an array of
    shape (rows, resamples). The draws depend only on ``seed`` and the number of
    utterances, so every row of one call sees the same resamples."""
    n = stacked.shape[1]
    rng = np.random.default_rng(seed)
    rows = max(1, min(resamples, _CHUNK_ELEMENTS // n))
    sums = np.empty((stacked.shape[0], resamples), dtype=np.int64)
    values = stacked.T.astype(np.float64)
    for start in range(0, resamples, rows):
        m = min(rows, resamples - start)
        idx = rng.integers(0, n, size=(m, n))
        # how often each utterance was drawn in each resample, then one matrix product;
        # the float sums are exact integers (far below 2**53) and are rounded back
        offsets = (idx + (np.arange(m, dtype=np.int64) * n)[:, None]).ravel()
        counts = np.bincount(offsets, minlength=m * n).reshape(m, n).astype(np.float64)
        sums[:, start:start + m] = np.rint(counts @ values).T.astype(np.int64)
        if progress is not None:
            progress(m)
    return sums


def paired_bootstrap(
    before_errors: Sequence[int] | npt.ArrayLike,
    after_errors: Sequence[int] | npt.ArrayLike,
    reference_words: Sequence[int] | npt.ArrayLike,
    *,
    resamples: int = 10_000,
    seed: int = 0,
    confidence: float = 0.95,
    progress: Callable[[int], None] | None = None,
) -> BootstrapResult:
    """Resample utterances (the same draw for both systems) and recompute corpus WER.

    Each resample draws ``n`` utterance indices with replacement (one index matrix per
    chunk of resamples); the draws are counted per utterance and the three per-utterance
    arrays summed with one matrix product per chunk. With one utterance every resample is
    that utterance: the intervals have zero width and the probability of improvement is 0
    or 1, which says nothing about variability (the report notes it). ``progress`` is
    called with the number of resamples of each chunk done.
    """
    stacked = np.stack([
        _as_int_array(before_errors, "before_errors"),
        _as_int_array(after_errors, "after_errors"),
        _as_int_array(reference_words, "reference_words"),
    ])
    n = stacked.shape[1]
    if n == 0:
        raise InputError("no utterances to compare")
    total_ref = int(stacked[2].sum())
    if total_ref == 0:
        raise InputError(UNDEFINED_WER)
    _check_resampling(resamples, confidence)
    sums = _resampled_sums(stacked, resamples, seed, progress)
    # a resample drawn only from empty references (vanishingly rare) is counted per one word
    # rather than divided by zero
    words = np.maximum(sums[2], 1).astype(np.float64)
    wer_b = sums[0] / words
    wer_a = sums[1] / words
    diff = (sums[1] - sums[0]) / words
    tail = (1.0 - confidence) / 2.0
    qs = [tail, 1.0 - tail]

    def interval(x: npt.NDArray[np.float64]) -> tuple[float, float]:
        lo, hi = np.quantile(x, qs)
        return float(lo), float(hi)

    point_b = float(stacked[0].sum()) / total_ref
    point_a = float(stacked[1].sum()) / total_ref
    return BootstrapResult(
        resamples=resamples,
        seed=seed,
        confidence=confidence,
        before_wer=point_b,
        after_wer=point_a,
        difference=point_a - point_b,
        before_ci=interval(wer_b),
        after_ci=interval(wer_a),
        difference_ci=interval(diff),
        probability_of_improvement=float(np.count_nonzero(diff < 0)) / resamples,
    )


# at most this many utterance draws (resamples x utterances) for the intervals printed
# beside a command's WER table: 10,000 resamples up to 20,000 utterances, fewer beyond
# (never under 1,000), so a table of a million utterances costs seconds, not minutes
TABLE_DRAWS = 200_000_000
TABLE_RESAMPLES = 10_000
MIN_TABLE_RESAMPLES = 1_000


def table_resamples(utterances: int) -> int:
    """Resamples for the WER intervals of a command's table of ``utterances``."""
    return max(MIN_TABLE_RESAMPLES, min(TABLE_RESAMPLES, TABLE_DRAWS // max(utterances, 1)))


@dataclass(frozen=True)
class WerIntervals:
    """Percentile intervals of several corpus WERs on the same utterances, from one
    bootstrap (the same resamples for each); ``intervals[k]`` belongs to ``errors[k]``."""

    resamples: int
    seed: int
    confidence: float
    intervals: tuple[tuple[float, float], ...]


def wer_intervals(
    errors: Sequence[Sequence[int] | npt.ArrayLike],
    reference_words: Sequence[int] | npt.ArrayLike,
    *,
    resamples: int | None = None,
    seed: int = 0,
    confidence: float = 0.95,
) -> WerIntervals:
    """Bootstrap intervals of the corpus WER of each row of per-utterance ``errors``.

    The draws are those of :func:`paired_bootstrap` with the same seed and resamples, so
    the interval of two systems here equals its ``before_ci`` and ``after_ci``. Without
    ``resamples``, :func:`table_resamples` of the number of utterances."""
    ref = _as_int_array(reference_words, "reference_words")
    rows = [_as_int_array(e, f"errors[{k}]") for k, e in enumerate(errors)]
    if not rows:
        raise InputError("no error counts to resample", field="errors")
    if any(len(r) != len(ref) for r in rows):
        raise InputError("every row of errors needs one count per utterance", field="errors")
    if len(ref) == 0:
        raise InputError("no utterances to resample")
    if int(ref.sum()) == 0:
        raise InputError(UNDEFINED_WER)
    b = table_resamples(len(ref)) if resamples is None else resamples
    _check_resampling(b, confidence)
    sums = _resampled_sums(np.stack([*rows, ref]), b, seed)
    words = np.maximum(sums[-1], 1).astype(np.float64)  # as paired_bootstrap does
    tail = (1.0 - confidence) / 2.0
    lo, hi = np.quantile(sums[:-1] / words, [tail, 1.0 - tail], axis=1)
    return WerIntervals(resamples=b, seed=seed, confidence=confidence,
                        intervals=tuple(zip(lo.tolist(), hi.tolist(), strict=True)))


def with_interval(counts: UtteranceCounts) -> WerResult:
    """The corpus WER of per-utterance ``counts`` with its bootstrap interval:
    :func:`with_intervals` of one."""
    return with_intervals([summarise(counts)], [counts.errors], counts.reference_words)[0]


def with_intervals(results: Sequence[WerResult],
                   errors: Sequence[Sequence[int] | npt.ArrayLike],
                   reference_words: Sequence[int] | npt.ArrayLike) -> list[WerResult]:
    """Each result with the bootstrap interval of its WER (seed 0, :func:`table_resamples`,
    95 %), drawn once for all of them (the draws of :func:`paired_bootstrap`, so a report's
    interval of the same WER with the same resamples is the same). Unchanged when the
    references hold no words (the WER is undefined)."""
    if int(np.asarray(reference_words).sum()) == 0:
        return list(results)
    found = wer_intervals(errors, reference_words)
    return [replace(r, interval=WerInterval(low, high, found.confidence, found.resamples,
                                            found.seed))
            for r, (low, high) in zip(results, found.intervals, strict=True)]


# --- matched-pairs sentence-segment word error test ----------------------------------------


@dataclass(frozen=True)
class MatchedPairsResult:
    """Gillick and Cox's statistic over segment error differences (after - before).

    ``method`` is "normal" (W and its two-sided normal p) or "sign" (the exact sign test
    over the non-zero segments, used when W is undefined; ``z`` is then None and ``note``
    says why).
    """

    segments: int
    min_run: int
    mean: float
    variance: float
    z: float | None
    p_value: float
    method: str = "normal"
    note: str = ""

    def to_dict(self) -> dict[str, object]:
        return asdict(self)


def _slot_errors(alignment: Alignment) -> tuple[IntArray, IntArray, npt.NDArray[np.bool_]]:
    """Errors per reference word, insertions per gap (n + 1 gaps), and hits per word."""
    n = len(alignment.reference)
    word_err = np.zeros(n, dtype=np.int64)
    gap_ins = np.zeros(n + 1, dtype=np.int64)
    hit = np.zeros(n, dtype=np.bool_)
    j = 0
    for op in alignment.ops:
        if op.kind == "insert":
            gap_ins[j] += 1
            continue
        # a step the scoring rules count as correct may cover several reference words
        width = op.ref.count(" ") + 1 if op.kind in ("equivalent", "optional") and op.ref \
            else 1
        if op.kind in ("equal", "equivalent", "optional"):
            hit[j:j + width] = True
        else:
            word_err[j] = 1
        j += width
    return word_err, gap_ins, hit


def segment_errors(
    before: Alignment, after: Alignment, *, min_run: int = 2
) -> list[tuple[int, int]]:
    """(before errors, after errors) of each error-bearing segment of one utterance.

    Anchors are runs of at least ``min_run`` consecutive reference words that both systems
    recognise correctly with no insertion by either between them; a segment is a maximal
    stretch between anchors (or the utterance's ends). Segments where neither system errs
    are left out, as they carry no evidence.
    """
    if before.reference != after.reference:
        raise ValueError("the two alignments are against different references")
    wb, gb, hb = _slot_errors(before)
    wa, ga, ha = _slot_errors(after)
    n = len(hb)
    both = hb & ha
    clean_gap = (gb == 0) & (ga == 0)
    anchor = np.zeros(n, dtype=np.bool_)
    j = 0
    while j < n:
        if not both[j]:
            j += 1
            continue
        k = j
        while k + 1 < n and both[k + 1] and clean_gap[k + 1]:
            k += 1
        if k - j + 1 >= min_run:
            anchor[j:k + 1] = True
        j = k + 1
    # interleave gap 0, word 0, gap 1, ..., word n-1, gap n; gaps are never anchors
    err_b = np.zeros(2 * n + 1, dtype=np.int64)
    err_a = np.zeros(2 * n + 1, dtype=np.int64)
    is_anchor = np.zeros(2 * n + 1, dtype=np.bool_)
    err_b[0::2], err_b[1::2] = gb, wb
    err_a[0::2], err_a[1::2] = ga, wa
    is_anchor[1::2] = anchor
    out: list[tuple[int, int]] = []
    eb = ea = 0
    for pos in range(2 * n + 1):
        if is_anchor[pos]:
            if eb or ea:
                out.append((eb, ea))
            eb = ea = 0
        else:
            eb += int(err_b[pos])
            ea += int(err_a[pos])
    if eb or ea:
        out.append((eb, ea))
    return out


def matched_pairs_statistic(differences: Sequence[int] | npt.ArrayLike, *,
                            min_run: int = 2) -> MatchedPairsResult:
    """W = mean / (sd / sqrt(n)) with the sample standard deviation; p two-sided normal.

    W is undefined with fewer than two segments or when every segment difference is the
    same (zero variance). Then the p-value is the exact two-sided sign test over the
    non-zero differences, the distribution-free test of the same null hypothesis (a
    segment is as likely to favour either system): ``k`` equal non-zero differences give
    ``min(1, 2 * 0.5**k)``, no non-zero difference or a single one gives 1.
    """
    z_arr = np.asarray(differences, dtype=np.float64)
    n = int(z_arr.size)
    mean = float(z_arr.mean()) if n else 0.0
    variance = float(z_arr.var(ddof=1)) if n > 1 else 0.0
    if n < 2 or variance == 0.0:
        lower = int(np.count_nonzero(z_arr < 0))
        nonzero = lower + int(np.count_nonzero(z_arr > 0))
        why = (f"{_count(n, 'segment')}, too few for W" if n < 2 else
               f"all {n} segment differences equal {mean:g}, so W is undefined")
        return MatchedPairsResult(
            n, min_run, mean, variance, None, binomial_two_sided(lower, nonzero),
            method="sign", note=f"{why}; p from the exact two-sided sign test over "
                                f"{_count(nonzero, 'non-zero segment')}")
    w = mean / math.sqrt(variance / n)
    return MatchedPairsResult(n, min_run, mean, variance, w, _normal_two_sided(w))


def matched_pairs(
    before: Sequence[Alignment], after: Sequence[Alignment], *, min_run: int = 2
) -> MatchedPairsResult:
    """The matched-pairs test over every utterance's segments (utterance ends bound them)."""
    if len(before) != len(after):
        raise ValueError(f"{len(before)} alignments before, {len(after)} after")
    diffs: list[int] = []
    for b, a in zip(before, after, strict=True):
        diffs.extend(ea - eb for eb, ea in segment_errors(b, a, min_run=min_run))
    return matched_pairs_statistic(diffs, min_run=min_run)


# --- sign test -----------------------------------------------------------------------------


@dataclass(frozen=True)
class SignTestResult:
    """Utterances where ``after`` made fewer (improved) or more (worsened) errors."""

    improved: int
    worsened: int
    ties: int
    p_value: float

    def to_dict(self) -> dict[str, object]:
        return asdict(self)


def binomial_two_sided(k: int, n: int) -> float:
    """Exact two-sided p of ``k`` successes in ``n`` fair trials (sum of tails, doubled)."""
    if n == 0:
        return 1.0
    m = min(k, n - k)
    tail = sum(math.comb(n, i) for i in range(m + 1))
    return min(1.0, 2 * tail / (1 << n))


def sign_test(differences: Sequence[int] | npt.ArrayLike) -> SignTestResult:
    d = np.asarray(differences)
    improved = int(np.count_nonzero(d < 0))
    worsened = int(np.count_nonzero(d > 0))
    ties = int(d.size) - improved - worsened
    return SignTestResult(improved, worsened, ties,
                          binomial_two_sided(improved, improved + worsened))


# --- Wilcoxon signed-rank test -------------------------------------------------------------


@dataclass(frozen=True)
class WilcoxonResult:
    """Signed-rank sums of the non-zero differences; ``method`` is "exact" or "normal",
    or "none" when no difference is non-zero (no evidence either way: p = 1)."""

    n: int
    zeros: int
    r_plus: float
    r_minus: float
    method: str
    z: float | None
    p_value: float

    @property
    def statistic(self) -> float:
        return min(self.r_plus, self.r_minus)

    def to_dict(self) -> dict[str, object]:
        out = asdict(self)
        out["statistic"] = self.statistic
        return out


def mid_ranks(values: npt.ArrayLike) -> npt.NDArray[np.float64]:
    """Ranks 1..n of ``values``; tied values share the mean of the ranks they span."""
    x = np.asarray(values, dtype=np.float64)
    order = np.argsort(x, kind="stable")
    sorted_x = x[order]
    starts = np.flatnonzero(np.r_[True, sorted_x[1:] != sorted_x[:-1]])
    ends = np.r_[starts[1:], x.size]
    group_rank = (starts + 1 + ends) / 2.0  # mean of ranks starts+1 .. ends
    ranks = np.empty(x.size, dtype=np.float64)
    ranks[order] = np.repeat(group_rank, ends - starts)
    return ranks


def _exact_rank_sum_p(ranks: npt.NDArray[np.float64], r_plus: float) -> float:
    """Two-sided p of the positive rank sum under random signs, by dynamic programming.

    Mid-ranks are multiples of 1/2, so doubled they are integers; the distribution of the
    doubled sum is built one rank at a time over all 2**n sign choices.
    """
    doubled = np.rint(2 * ranks).astype(np.int64)
    total = int(doubled.sum())
    dist = np.zeros(total + 1, dtype=np.float64)
    dist[0] = 1.0
    for r in doubled:
        shifted = np.zeros_like(dist)
        shifted[r:] = dist[:total + 1 - r]
        dist = 0.5 * (dist + shifted)
    t = round(2 * r_plus)
    lower = float(dist[:t + 1].sum())
    upper = float(dist[t:].sum())
    return min(1.0, 2.0 * min(lower, upper))


def wilcoxon_signed_rank(
    differences: Sequence[int] | npt.ArrayLike, *, exact_limit: int = 50
) -> WilcoxonResult:
    d = np.asarray(differences, dtype=np.float64)
    nonzero = d[d != 0]
    zeros = int(d.size - nonzero.size)
    n = int(nonzero.size)
    if n == 0:
        return WilcoxonResult(0, zeros, 0.0, 0.0, "none", None, 1.0)
    ranks = mid_ranks(np.abs(nonzero))
    r_plus = float(ranks[nonzero > 0].sum())
    r_minus = float(ranks[nonzero < 0].sum())
    if n <= exact_limit:
        return WilcoxonResult(n, zeros, r_plus, r_minus, "exact", None,
                              _exact_rank_sum_p(ranks, r_plus))
    _, tie_sizes = np.unique(np.abs(nonzero), return_counts=True)
    tie_term = float(np.sum(tie_sizes.astype(np.float64) ** 3 - tie_sizes))
    variance = n * (n + 1) * (2 * n + 1) / 24.0 - tie_term / 48.0
    z = (r_plus - n * (n + 1) / 4.0) / math.sqrt(variance)
    return WilcoxonResult(n, zeros, r_plus, r_minus, "normal", z, _normal_two_sided(z))
