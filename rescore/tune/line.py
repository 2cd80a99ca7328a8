"""Exact line search (Och, 2003): along a line in weight space each total is linear in the
step, so the corpus error along it is a step function found exactly; coordinate ascent over
the tuned weights."""

from __future__ import annotations

import math
from collections.abc import Mapping, Sequence
from dataclasses import dataclass

import numpy as np

from rescore.errors import ParameterError
from rescore.progress import Advance
from rescore.scoring import DevMatrix, FeatureMatrix, chosen_errors
from rescore.tune.common import (
    _MAX_SWEEPS,
    _MIN_WIDTH,
    DEFAULT_BOUND,
    _result,
    _set,
)
from rescore.tune.results import TuneResult
from rescore.weights import ACOUSTIC, LM, WORDS, Weights


@dataclass(frozen=True, eq=False)
class ErrorCurve:
    """Corpus errors along ``start + step * direction``: a step function of ``step``.

    ``errors[0]`` holds below ``breaks[0]``, ``errors[k]`` between ``breaks[k - 1]`` and
    ``breaks[k]``, ``errors[-1]`` above the last break. At a break itself ties decide.
    """

    breaks: np.ndarray
    errors: np.ndarray

    def at(self, step: float | np.ndarray) -> np.ndarray:
        return np.asarray(self.errors[np.searchsorted(self.breaks, step, side="right")])


def _sort_lines(a: np.ndarray, b: np.ndarray, offsets: np.ndarray) -> np.ndarray:
    """Rows ordered by (utterance, slope, falling intercept, row)."""
    n, sizes = len(a), np.diff(offsets)
    depth = int(sizes.max())
    if len(sizes) * depth > 2 * n:  # ragged lists: one global sort
        utt = np.repeat(np.arange(len(sizes)), sizes)
        return np.lexsort((np.arange(n), -a, b, utt))
    # lists of similar length: sort each padded row on its own, much cheaper
    local = np.arange(n) - np.repeat(offsets[:-1], sizes)
    utt = np.repeat(np.arange(len(sizes)), sizes)
    keys_b = np.full((len(sizes), depth), np.inf)
    keys_a = np.full((len(sizes), depth), np.inf)
    keys_b[utt, local], keys_a[utt, local] = b, -a
    cols = np.broadcast_to(np.arange(depth), keys_b.shape)
    order = np.lexsort((cols, keys_a, keys_b), axis=1)
    rows = order + offsets[:-1, None]
    return np.asarray(rows[order < sizes[:, None]])


def _prune_lines(su: np.ndarray, sa: np.ndarray, sb: np.ndarray, se: np.ndarray, n_utt: int,
                 lo: float, hi: float) -> tuple[np.ndarray, ...]:
    """Drop lines strictly below the top line at ``lo`` at both ends of [lo, hi], or below
    the top line at ``hi`` at both ends: being linear, they are below it all along."""
    start = np.searchsorted(su, np.arange(n_utt))
    v_lo, v_hi = sa + lo * sb, sa + hi * sb
    at_lo = np.maximum.reduceat(v_lo, start)[su]
    at_hi = np.maximum.reduceat(v_hi, start)[su]
    pos = np.arange(len(su))
    top_lo = np.minimum.reduceat(np.where(v_lo >= at_lo, pos, len(su)), start)[su]
    top_hi = np.minimum.reduceat(np.where(v_hi >= at_hi, pos, len(su)), start)[su]
    beaten = ((v_lo < v_lo[top_lo]) & (v_hi < v_hi[top_lo])) | (
        (v_lo < v_lo[top_hi]) & (v_hi < v_hi[top_hi]))
    keep = ~beaten
    return su[keep], sa[keep], sb[keep], se[keep]


def _envelope_curve(a: np.ndarray, b: np.ndarray, offsets: np.ndarray, errors: np.ndarray,
                    lo: float = -np.inf, hi: float = np.inf) -> ErrorCurve:
    """Exact corpus errors along totals ``a + step * b`` for steps in (lo, hi).

    Each utterance follows the upper envelope of its lines: starting from the line on top
    just above ``lo`` (the flattest, highest, earliest line when ``lo`` is -inf), the next
    line is the one that crosses the current one first among the steeper ones (the
    steepest of those crossing at the same step). One round advances every unfinished
    utterance by one line, until its next crossing lies at or beyond ``hi``.
    """
    n_utt = len(offsets) - 1
    order = _sort_lines(a, b, offsets)
    utt = np.repeat(np.arange(n_utt), np.diff(offsets))
    su, sa, sb, se = utt[order], a[order], b[order], errors[order]
    # of parallel lines only the highest (earliest among equals) can be on top
    keep = np.ones(len(su), dtype=bool)
    keep[1:] = (su[1:] != su[:-1]) | (sb[1:] != sb[:-1])
    su, sa, sb, se = su[keep], sa[keep], sb[keep], se[keep]
    if np.isfinite(lo) and np.isfinite(hi):
        su, sa, sb, se = _prune_lines(su, sa, sb, se, n_utt, lo, hi)
    start = np.searchsorted(su, np.arange(n_utt))
    stop = np.append(start[1:], len(su))
    if np.isfinite(lo):
        # on top just above lo: the highest at lo, the steepest of equals there
        value = sa + lo * sb
        top = np.maximum.reduceat(value, start)
        pos = np.arange(len(su))
        start = np.maximum.reduceat(np.where(value >= top[su], pos, -1), start)
    base_errors = int(se[start].sum())
    cur = start.copy()
    where = np.full(n_utt, lo)
    act = np.flatnonzero(stop - start > 1)
    steps: list[np.ndarray] = []
    deltas: list[np.ndarray] = []
    while len(act):
        lens = stop[act] - cur[act] - 1
        first = np.concatenate([[0], np.cumsum(lens)[:-1]])
        owner = np.repeat(np.arange(len(act)), lens)
        ci = cur[act][owner]
        pos = ci + 1 + (np.arange(int(lens.sum())) - first[owner])
        cross = (sa[ci] - sa[pos]) / (sb[pos] - sb[ci])
        low = np.minimum.reduceat(cross, first)
        nxt = np.maximum.reduceat(np.where(cross <= low[owner], pos, -1), first)
        at = np.maximum(low, where[act])
        go = at < hi
        act, nxt, at = act[go], nxt[go], at[go]
        delta = se[nxt] - se[cur[act]]
        moved = delta != 0
        steps.append(at[moved])
        deltas.append(delta[moved])
        cur[act], where[act] = nxt, at
        act = act[stop[act] - nxt > 1]
    if steps:
        all_steps, all_deltas = np.concatenate(steps), np.concatenate(deltas)
    else:
        all_steps, all_deltas = np.zeros(0), np.zeros(0, dtype=np.int64)
    srt = np.argsort(all_steps, kind="stable")
    all_steps, all_deltas = all_steps[srt], all_deltas[srt]
    breaks, first_of = np.unique(all_steps, return_index=True)
    summed = np.add.reduceat(all_deltas, first_of) if len(breaks) else all_deltas
    curve = base_errors + np.concatenate([[0], np.cumsum(summed)])
    # drop breaks where the errors do not change (deltas that cancel at one step)
    change = np.flatnonzero(np.diff(curve) != 0)
    return ErrorCurve(breaks=breaks[change], errors=curve[np.concatenate([[0], change + 1])])


def line_errors(matrix: FeatureMatrix, start: Weights,
                direction: Mapping[str, float]) -> ErrorCurve:
    """Exact corpus error curve along ``start + step * direction`` (Och, 2003)."""
    matrix = DevMatrix.check(matrix)
    errors = matrix.word_errors
    d = np.zeros(len(matrix.names))
    for name, value in direction.items():
        d[matrix.index(name)] = value
    a = matrix.values @ start.vector(matrix.names)
    b = matrix.values @ d
    return _envelope_curve(a, b, matrix.offsets, errors)


def _best_step(curve: ErrorCurve, lo: float, hi: float) -> tuple[float, int]:
    """Middle of the fewest-error interval within [lo, hi] (step 0 is the current point).

    Among equal intervals: the one holding step 0, else the widest, else the first.
    """
    edges = np.concatenate([[-np.inf], curve.breaks, [np.inf]])
    left, right = np.maximum(edges[:-1], lo), np.minimum(edges[1:], hi)
    width = right - left
    scale = max(1.0, abs(lo), abs(hi))
    ok = width > _MIN_WIDTH * scale
    if not ok.any():  # a degenerate range: stay where we are
        return 0.0, int(curve.at(0.0))
    errs = np.where(ok, curve.errors, np.iinfo(np.int64).max)
    fewest = errs.min()
    cand = np.flatnonzero(errs == fewest)
    holds = cand[(left[cand] < 0.0) & (right[cand] > 0.0)]
    k = int(holds[0]) if len(holds) else int(cand[np.argmax(width[cand])])
    return float((left[k] + right[k]) / 2.0), int(fewest)


def _bounds_for(names: Sequence[str], bounds: Mapping[str, tuple[float, float]] | None
                ) -> tuple[np.ndarray, np.ndarray]:
    lo, hi = [], []
    for name in names:
        if bounds is not None and name in bounds:
            a, b = bounds[name]
        elif name in (LM, ACOUSTIC):
            a, b = 0.0, DEFAULT_BOUND
        else:
            a, b = -DEFAULT_BOUND, DEFAULT_BOUND
        if not (math.isfinite(a) and math.isfinite(b)) or a > b:
            raise ParameterError(f"bad bounds {a!r}..{b!r} for {name!r}", field="bounds")
        lo.append(float(a))
        hi.append(float(b))
    return np.array(lo), np.array(hi)


def _step_range(w: np.ndarray, d: np.ndarray, idx: np.ndarray, lo: np.ndarray,
                hi: np.ndarray) -> tuple[float, float]:
    """The steps along ``d`` that keep every tuned weight inside its bounds."""
    low, high = -np.inf, np.inf
    for pos, k in enumerate(idx):
        if d[k] != 0.0:
            a, b = (lo[pos] - w[k]) / d[k], (hi[pos] - w[k]) / d[k]
            low, high = max(low, min(a, b)), min(high, max(a, b))
    return float(low), float(high)


def _line_move(matrix: FeatureMatrix, errors: np.ndarray, w: np.ndarray, d: np.ndarray,
               idx: np.ndarray, lo: np.ndarray, hi: np.ndarray, current: int
               ) -> tuple[np.ndarray, int]:
    """Move to the middle of the best interval along ``d`` if it is no worse than now."""
    low, high = _step_range(w, d, idx, lo, hi)
    if not low < high:
        return w, current
    curve = _envelope_curve(matrix.values @ w, matrix.values @ d, matrix.offsets, errors,
                            low, high)
    step, found = _best_step(curve, low, high)
    if found == current and int(curve.at(0.0)) != current:
        # the current point sits on a break or a bound that scores as well as the best
        # interval: stay, rather than leave a tie-broken point for an equal plateau
        found = current + 1
    candidates = [(found, 0, step)]
    # a bound itself (say LM weight 0) can hold fewer errors than any open interval, when
    # hypotheses tie there; along an axis, the ends are checked by scoring every hypothesis
    ends = ((1, low), (2, high)) if np.count_nonzero(d) == 1 else ()
    for rank, end in ends:
        if math.isfinite(end):
            candidates.append((chosen_errors(matrix, w + end * d, errors), rank, end))
    found, _, step = min(candidates)
    if found > current:
        return w, current
    trial = w + step * d
    trial[idx] = np.clip(trial[idx], lo, hi)
    actual = chosen_errors(matrix, trial, errors)
    # the check guards against rounding at near-ties
    return (trial, actual) if actual <= current else (w, current)


def _coordinate_ascent(matrix: FeatureMatrix, errors: np.ndarray, w: np.ndarray,
                       idx: np.ndarray, lo: np.ndarray, hi: np.ndarray,
                       rng: np.random.Generator) -> tuple[np.ndarray, int]:
    """Exact line searches along each tuned coordinate, sweep after sweep; when a sweep
    gains nothing, as many random directions; stop when those gain nothing either."""
    w = w.copy()
    current = chosen_errors(matrix, w, errors)
    width = len(matrix.names)
    axes = []
    for k in idx:
        d = np.zeros(width)
        d[k] = 1.0
        axes.append(d)
    for _ in range(_MAX_SWEEPS):
        before = current
        for d in axes:
            w, current = _line_move(matrix, errors, w, d, idx, lo, hi, current)
        if current < before:
            continue
        if len(idx) < 2:
            break
        for _ in idx:
            d = np.zeros(width)
            d[idx] = rng.normal(size=len(idx))
            w, current = _line_move(matrix, errors, w, d, idx, lo, hi, current)
        if current >= before:
            break
    return w, current


def exact_search(
    matrix: FeatureMatrix,
    *,
    tune: Sequence[str] = (LM, WORDS),
    start: Weights = Weights(),  # noqa: B008 - frozen, never mutated
    seed: int = 0,
    restarts: int = 3,
    bounds: Mapping[str, tuple[float, float]] | None = None,
    also_from: Sequence[Weights] = (),
    progress: Advance | None = None,
) -> TuneResult:
    """Coordinate-wise exact line search over the weights named in ``tune`` (Och, 2003).

    Along one direction every hypothesis's total is a line in the step; each utterance's
    choice follows the upper envelope of its lines, so its errors are piecewise constant;
    merging all breakpoints gives the exact corpus error curve. The search moves to the
    middle of the best interval within ``bounds`` when it is no worse than the current
    point (among equal intervals: the one holding the current point, else the widest);
    along an axis, the ends of the bounded range are scored too and taken when strictly
    better.
    Default bounds: 0..100 for ``lm`` and ``acoustic``, -100..100 for any other weight.

    Sweeps search along every tuned coordinate until one gains nothing; then as many
    seeded random directions are tried (common practice: they reach narrow diagonal
    valleys that axis moves miss), and sweeping resumes if they gained. Runs start from
    ``start``, then from each of ``also_from``, then ``restarts`` more from seeded random
    points (each tuned weight drawn uniformly within max(1, |w|) of the best point so far,
    inside the bounds). The
    fewest-error run wins, the earliest on ties, so the result is never worse than
    ``start`` (once moved inside the bounds). Weights not in ``tune`` (by default the
    acoustic scale, 1) stay as in ``start``. ``progress`` is called with 1 after each run
    (``1 + len(also_from) + restarts`` of them).
    """
    matrix = DevMatrix.check(matrix)
    errors = matrix.word_errors
    tuned = tuple(dict.fromkeys(tune))
    if not tuned:
        raise ParameterError("nothing to tune", field="tune")
    names = tuple(dict.fromkeys((*matrix.names, *start.features)))
    idx = np.array([matrix.index(t) for t in tuned])
    lo, hi = _bounds_for(tuned, bounds)
    rng = np.random.default_rng(seed)
    best, best_errors = np.zeros(0), np.iinfo(np.int64).max
    for origin in (start, *also_from):
        w0 = start.vector(matrix.names)
        w0[idx] = np.clip(origin.vector(matrix.names)[idx], lo, hi)
        w, e = _coordinate_ascent(matrix, errors, w0, idx, lo, hi, rng)
        if e < best_errors:
            best, best_errors = w, e
        if progress is not None:
            progress(1)
    for _ in range(restarts):
        spread = np.maximum(1.0, np.abs(best[idx]))
        trial = best.copy()
        trial[idx] = np.clip(best[idx] + rng.uniform(-1.0, 1.0, len(idx)) * spread, lo, hi)
        w, e = _coordinate_ascent(matrix, errors, trial, idx, lo, hi, rng)
        if e < best_errors:
            best, best_errors = w, e
        if progress is not None:
            progress(1)
    updates = {matrix.names[k]: float(best[k]) for k in idx}
    weights = _set(start, names, updates)
    settings = {"restarts": restarts, "seed": seed, "starts": 1 + len(also_from),
                "bounds": {t: [float(a), float(b)]
                           for t, a, b in zip(tuned, lo, hi, strict=True)}}
    return _result(matrix, weights, "exact", tuned, None, settings)
