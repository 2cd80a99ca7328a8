"""Grid search: every (LM weight, insertion penalty) point scored at once, many points per
block, and the regions of its error surface."""

from __future__ import annotations

from collections.abc import Sequence

import numpy as np

from rescore.progress import Advance
from rescore.scoring import DevMatrix, FeatureMatrix, segment_argmax
from rescore.tune.common import (
    _BLOCK,
    DEFAULT_LM_GRID,
    DEFAULT_PENALTY_GRID,
    _result,
    _set,
)
from rescore.tune.grids import _as_grid
from rescore.tune.results import Surface, TuneResult
from rescore.weights import LM, WORDS, Weights


def _slot_layout(matrix: FeatureMatrix, words: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """Rows ordered by (utterance, word count, row) and the start of each group.

    Rows of one utterance with the same word count move together along the penalty axis,
    so only the best of them (earliest on ties) can ever be chosen at a given LM weight.
    With a non-integer word column every row is its own group.
    """
    n = matrix.n_hypotheses
    utt = matrix.utterance_of_row
    rows = np.arange(n)
    integral = bool(np.all(words == np.round(words)))
    key = words if integral else rows.astype(np.float64)
    order = np.lexsort((rows, key, utt))
    su, sk = utt[order], key[order]
    new = np.ones(n, dtype=bool)
    new[1:] = (su[1:] != su[:-1]) | (sk[1:] != sk[:-1])
    return order, np.flatnonzero(new)


def _grid_errors(matrix: FeatureMatrix, errors: np.ndarray, fixed: np.ndarray, lm: np.ndarray,
                 words: np.ndarray, lm_grid: np.ndarray, pen_grid: np.ndarray,
                 layout: str = "auto", progress: Advance | None = None) -> np.ndarray:
    """Corpus errors at every (lm, penalty) point, shape (len(lm_grid), len(pen_grid))."""
    n, n_utt = matrix.n_hypotheses, matrix.n_utterances
    order, gstarts = _slot_layout(matrix, words)
    gsizes = np.diff(np.append(gstarts, n))
    g_utt = matrix.utterance_of_row[order[gstarts]]
    per_utt = np.bincount(g_utt, minlength=n_utt)
    slots = int(per_utt.max())
    n_groups = len(gstarts)
    padded = layout == "padded" or (layout == "auto" and n_utt * slots <= 2 * n_groups)
    g_off = np.concatenate([[0], np.cumsum(per_utt)]).astype(np.int64)
    sorted_fixed, sorted_lm, sorted_rows = fixed[order], lm[order], order
    out = np.empty((len(lm_grid), len(pen_grid)), dtype=np.int64)
    for i, lw in enumerate(lm_grid):
        a = sorted_fixed + lw * sorted_lm
        top = np.maximum.reduceat(a, gstarts)
        cand = np.where(a >= np.repeat(top, gsizes), sorted_rows, n)
        rep = np.minimum.reduceat(cand, gstarts)  # earliest best row of each group
        # within an utterance, order the groups by their row so argmax ties go to the earliest
        rep = rep[np.lexsort((rep, g_utt))]
        g_a, g_w, g_e = fixed[rep] + lw * lm[rep], words[rep], errors[rep]
        if padded:
            out[i] = _padded_errors(g_a, g_w, g_e, g_off, slots, pen_grid)
        else:
            out[i] = _ragged_errors(g_a, g_w, g_e, g_off, pen_grid)
        if progress is not None:
            progress(1)
    return out


def _padded_errors(g_a: np.ndarray, g_w: np.ndarray, g_e: np.ndarray, g_off: np.ndarray,
                   slots: int, pen: np.ndarray) -> np.ndarray:
    """Errors at each penalty, the groups of every utterance laid out in ``slots`` columns.

    A group that another beats (or ties while coming earlier) at both ends of the penalty
    range loses everywhere between, the totals being linear in the penalty; such groups are
    dropped, and utterances are evaluated in blocks of equal survivor counts.
    """
    n_utt = len(g_off) - 1
    local = np.arange(len(g_a)) - np.repeat(g_off[:-1], np.diff(g_off))
    utt = np.repeat(np.arange(n_utt), np.diff(g_off))
    a_pad = np.full((n_utt, slots), -np.inf)
    w_pad = np.zeros((n_utt, slots))
    e_pad = np.zeros((n_utt, slots), dtype=np.int64)
    a_pad[utt, local], w_pad[utt, local], e_pad[utt, local] = g_a, g_w, g_e
    low, high = a_pad + pen[0] * w_pad, a_pad + pen[-1] * w_pad
    ge = (low[:, :, None] >= low[:, None, :]) & (high[:, :, None] >= high[:, None, :])
    gt = (low[:, :, None] > low[:, None, :]) & (high[:, :, None] > high[:, None, :])
    earlier = np.triu(np.ones((slots, slots), dtype=bool), 1)  # [t, s]: slot t comes first
    alive = ~((ge & earlier) | gt).any(axis=1)
    count = alive.sum(axis=1)
    # surviving slots first, in their original (row) order
    keep = np.argsort(~alive, axis=1, kind="stable")
    out = np.zeros(len(pen), dtype=np.int64)
    for width in np.unique(count):
        rows = np.flatnonzero(count == width)
        cols = keep[rows, :width]
        e_b = np.take_along_axis(e_pad[rows], cols, axis=1)
        if width == 1:
            out += int(e_b.sum())
            continue
        a_b = np.take_along_axis(a_pad[rows], cols, axis=1)
        w_b = np.take_along_axis(w_pad[rows], cols, axis=1)
        out += _block_errors(a_b, w_b, e_b, pen)
    return out


def _block_errors(a: np.ndarray, w: np.ndarray, e: np.ndarray, pen: np.ndarray) -> np.ndarray:
    n_utt, width = a.shape
    out = np.empty(len(pen), dtype=np.int64)
    step = max(1, _BLOCK // max(1, n_utt * width))
    buf = np.empty((n_utt, min(step, len(pen)), width))
    for j in range(0, len(pen), step):
        p = pen[j:j + step]
        b = buf[:, :len(p)]
        np.multiply(p[None, :, None], w[:, None, :], out=b)
        b += a[:, None, :]
        pick = b.argmax(axis=2)
        out[j:j + len(p)] = np.take_along_axis(e, pick, axis=1).sum(axis=0)
    return out


def _ragged_errors(g_a: np.ndarray, g_w: np.ndarray, g_e: np.ndarray, g_off: np.ndarray,
                   pen: np.ndarray) -> np.ndarray:
    out = np.empty(len(pen), dtype=np.int64)
    step = max(1, _BLOCK // max(1, len(g_a)))
    for j in range(0, len(pen), step):
        p = pen[j:j + step]
        scores = g_a[:, None] + g_w[:, None] * p[None, :]
        pick = segment_argmax(scores, g_off)
        out[j:j + len(p)] = g_e[pick].sum(axis=0)
    return out


def plateau_centre(errors: np.ndarray) -> tuple[int, int]:
    """The grid cell chosen among those with the fewest errors.

    The cells with the fewest errors form regions (4-neighbour connected, in grid steps).
    The largest region wins (on a size tie, the one whose first cell in row-major order
    comes first); within it, the cell nearest the region's centroid, measured in grid
    steps, is chosen (on a distance tie, the first in row-major order). A centre of a wide
    plateau is less sensitive to the dev set than its edge.
    """
    regions = _regions(errors == errors.min())
    return _centre(max(regions, key=len))  # max keeps the first of equal sizes


def _regions(mask: np.ndarray) -> list[list[tuple[int, int]]]:
    """4-neighbour connected regions of ``mask``, each in row-major order, in order met."""
    seen = np.zeros_like(mask)
    regions: list[list[tuple[int, int]]] = []
    rows, cols = mask.shape
    for i, j in zip(*np.nonzero(mask), strict=True):
        if seen[i, j]:
            continue
        seen[i, j] = True
        stack, region = [(int(i), int(j))], []
        while stack:
            a, b = stack.pop()
            region.append((a, b))
            for c, d in ((a - 1, b), (a + 1, b), (a, b - 1), (a, b + 1)):
                if 0 <= c < rows and 0 <= d < cols and mask[c, d] and not seen[c, d]:
                    seen[c, d] = True
                    stack.append((c, d))
        regions.append(sorted(region))
    return regions


def _centre(region: list[tuple[int, int]]) -> tuple[int, int]:
    cells = np.array(region, dtype=np.float64)
    dist = ((cells - cells.mean(axis=0)) ** 2).sum(axis=1)
    return region[int(np.argmin(dist))]  # first of equal distances (row-major order)


def low_points(errors: np.ndarray, count: int = 6, levels: int = 3) -> list[tuple[int, int]]:
    """Centres of the grid's lowest regions: the plateau centre first, then the regions of
    the ``levels`` lowest error values, fewest errors first and larger first, ``count`` in all.
    """
    out = [plateau_centre(errors)]
    for value in np.unique(errors)[:levels]:
        for region in sorted(_regions(errors == value), key=len, reverse=True):
            cell = _centre(region)
            if cell not in out:
                out.append(cell)
            if len(out) >= count:
                return out
    return out


def edge_points(errors: np.ndarray) -> list[tuple[int, int]]:
    """The fewest-error cell of each edge of the grid (first in row-major order on ties).

    An edge such as LM weight 0 is a slice of its own: there, hypotheses with equal
    acoustic scores tie and list order decides, which no nearby interior point reproduces.
    """
    last_i, last_j = errors.shape[0] - 1, errors.shape[1] - 1
    out: list[tuple[int, int]] = []
    for line, fixed_row, at in ((errors[0], True, 0), (errors[last_i], True, last_i),
                                (errors[:, 0], False, 0), (errors[:, last_j], False, last_j)):
        k = int(np.argmin(line))
        cell = (at, k) if fixed_row else (k, at)
        if cell not in out:
            out.append(cell)
    return out


def grid_search(
    matrix: FeatureMatrix,
    *,
    lm_grid: Sequence[float] | np.ndarray | None = None,
    penalty_grid: Sequence[float] | np.ndarray | None = None,
    base: Weights = Weights(),  # noqa: B008 - frozen, never mutated
    lm_column: str | None = LM,
    progress: Advance | None = None,
) -> TuneResult:
    """Errors at every (LM weight, insertion penalty) grid point; the other weights from ``base``.

    ``progress`` is called with 1 as each LM-weight row of the grid is done.

    ``lm_column`` names the column the LM weight multiplies; ``None`` (no language model)
    tunes the penalty alone on a one-point LM axis at 0.

    Defaults: LM weight 0 to 30 in 121 points, penalty -20 to +20 in 81 points. The chosen
    point follows :func:`plateau_centre`. Rows of one utterance with the same word count
    are reduced to the best of them at each LM weight; the remaining scores of many penalty
    values are evaluated in one (utterances x points x slots) block and an argmax.
    """
    matrix = DevMatrix.check(matrix)
    errors = matrix.word_errors
    lm_values = _as_grid(lm_grid, DEFAULT_LM_GRID, "lm_grid")
    pen_values = _as_grid(penalty_grid, DEFAULT_PENALTY_GRID, "penalty_grid")
    wi = matrix.index(WORDS)
    vec = base.vector(matrix.names)
    vec[wi] = 0.0
    if lm_column is None:
        lm_values, lm = np.zeros(1), np.zeros(matrix.n_hypotheses)
    else:
        li = matrix.index(lm_column)
        vec[li], lm = 0.0, matrix.values[:, li]
    fixed = matrix.values @ vec
    surface = _grid_errors(matrix, errors, fixed, lm, matrix.values[:, wi], lm_values,
                           pen_values, progress=progress)
    i, j = plateau_centre(surface)
    updates = {WORDS: float(pen_values[j])}
    if lm_column is not None:
        updates[lm_column] = float(lm_values[i])
    weights = _set(base, matrix.names, updates)
    tuned = (WORDS,) if lm_column is None else (lm_column, WORDS)
    settings = {"lm_grid": [float(lm_values[0]), float(lm_values[-1]), len(lm_values)],
                "penalty_grid": [float(pen_values[0]), float(pen_values[-1]), len(pen_values)],
                "tie_rule": "centre of the largest best region"}
    return _result(matrix, weights, "grid", tuned,
                   Surface(lm=lm_values, penalty=pen_values, errors=surface), settings)
