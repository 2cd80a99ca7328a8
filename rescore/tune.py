"""Tuning the weights of the combined score on a dev set: grid search and exact line search.

Both searches work on a :class:`~rescore.scoring.FeatureMatrix` whose ``errors`` (word edit
distance of every hypothesis to its reference) were computed once; a search only ever sums
them, it never re-aligns.

- :func:`grid_search` scores every (LM weight, insertion penalty) point of a grid, many
  points at once, and returns the whole error surface.
- :func:`exact_search` is a coordinate-wise exact line search (Och, 2003): along a line in
  weight space each hypothesis's total is linear in the step, so the corpus error along the
  line is a step function whose breakpoints can be found exactly.
- :func:`tune` picks the method, adds cross-validation and an N-best depth table.

Common practice for where the LM weight lands (in natural-log units): end-to-end
recognizers with shallow fusion usually below 1; HMM-based recognizers near 8 to 15 with
a positive word bonus (insertion penalty above 0 in our sign convention, where the
penalty multiplies the word count and is added to the total).
"""

from __future__ import annotations

import json
import logging
import math
from collections.abc import Mapping, Sequence
from dataclasses import dataclass, field, replace
from pathlib import Path
from typing import Any

import numpy as np

from rescore.errors import InputError, UsageError
from rescore.limits import WEIGHTS_FILE_LIMIT
from rescore.outputs import write_text_atomic
from rescore.progress import Advance, Report, Steps
from rescore.readers import read_json
from rescore.scoring import (
    ACOUSTIC,
    LM,
    WORDS,
    FeatureMatrix,
    Weights,
    choose,
    oracle_rows,
    segment_argmax,
)
from rescore.wer import UNDEFINED_WER

log = logging.getLogger(__name__)

DEFAULT_LM_GRID = (0.0, 30.0, 121)
DEFAULT_PENALTY_GRID = (-20.0, 20.0, 81)
DEFAULT_BOUND = 100.0
# a grid whose fewest-errors region touches its edge is widened at most this many times
# (each adds half the axis's span: 40 -> 60 -> 90 -> 135 -> 202 for the default penalty)
MAX_WIDENINGS = 4
DEPTHS = (1, 2, 5, 10)
# elements of one (utterances x points x slots) score block; about 32 MB of float64
_BLOCK = 4_000_000
_MAX_SWEEPS = 50
# intervals of the line-search error curve narrower than this (relative) are rounding noise
_MIN_WIDTH = 1e-9


# --------------------------------------------------------------------------- results


@dataclass(frozen=True, eq=False)
class Surface:
    """Corpus errors at every grid point: ``errors[i, j]`` at ``lm[i]``, ``penalty[j]``."""

    lm: np.ndarray
    penalty: np.ndarray
    errors: np.ndarray

    def to_dict(self) -> dict[str, Any]:
        return {"lm_weight": self.lm.tolist(), "insertion_penalty": self.penalty.tolist(),
                "errors": self.errors.tolist()}


@dataclass(frozen=True)
class Fold:
    """One held-out fold of the cross-validation."""

    utterances: int
    reference_words: int
    errors: int
    wer: float
    weights: Weights

    def to_dict(self) -> dict[str, Any]:
        return {"utterances": self.utterances, "reference_words": self.reference_words,
                "errors": self.errors, "wer": self.wer, **_weights_dict(self.weights)}


@dataclass(frozen=True)
class CrossValidation:
    """k-fold cross-validated WER: held-out errors summed over all folds / total words."""

    folds: tuple[Fold, ...]
    errors: int
    reference_words: int
    wer: float
    seed: int

    def to_dict(self) -> dict[str, Any]:
        return {"k": len(self.folds), "seed": self.seed, "errors": self.errors,
                "reference_words": self.reference_words, "wer": self.wer,
                "folds": [f.to_dict() for f in self.folds]}


@dataclass(frozen=True)
class DepthRow:
    """WERs when only the first ``depth`` hypotheses of every list are kept.

    ``tuned_wer`` is at the weights tuned on the full lists (not re-tuned per depth).
    """

    depth: int
    label: str
    one_best_wer: float
    tuned_wer: float
    oracle_wer: float

    def to_dict(self) -> dict[str, Any]:
        return {"depth": self.depth, "label": self.label, "one_best_wer": self.one_best_wer,
                "tuned_wer": self.tuned_wer, "oracle_wer": self.oracle_wer}


@dataclass(frozen=True)
class Widening:
    """One widening of the grid: the sides of the grid that the fewest-errors region
    touched (with its error count), and the grid that replaced it."""

    sides: tuple[str, ...]
    dev_errors: int
    lm_grid: tuple[float, float, int]
    penalty_grid: tuple[float, float, int]

    def describe(self) -> str:
        lm, pen = self.lm_grid, self.penalty_grid
        return (f"the fewest-errors region ({self.dev_errors} errors) touched the grid's "
                f"{', '.join(_SIDE_LABELS[s] for s in self.sides)}; grid widened to LM "
                f"weight {lm[0]:g}..{lm[1]:g} ({lm[2]} points), penalty {pen[0]:g}..{pen[1]:g} "
                f"({pen[2]} points)")

    def to_dict(self) -> dict[str, Any]:
        return {"sides": list(self.sides), "dev_errors": self.dev_errors,
                "lm_grid": list(self.lm_grid), "penalty_grid": list(self.penalty_grid)}


@dataclass(frozen=True)
class TuneResult:
    """Tuned weights and how they were found.

    ``cv``, ``cv_warning`` and ``depth`` are filled in by :func:`tune`; the bare searches
    leave them empty. ``surface`` is the grid's error surface (``None`` for exact search).
    """

    weights: Weights
    dev_errors: int
    dev_wer: float
    baseline_wer: float
    oracle_wer: float
    reference_words: int
    utterances: int
    search: str
    tuned: tuple[str, ...]
    surface: Surface | None = None
    cv: CrossValidation | None = None
    cv_warning: str | None = None
    edge_warning: str | None = None
    depth: tuple[DepthRow, ...] = ()
    settings: Mapping[str, Any] = field(default_factory=dict)
    widenings: tuple[Widening, ...] = ()

    @property
    def cv_wer(self) -> float | None:
        """The cross-validated WER (``None`` without cross-validation)."""
        return None if self.cv is None else self.cv.wer

    @property
    def cv_gap(self) -> float | None:
        """Cross-validated WER minus dev WER, absolute (positive: worse on held-out data)."""
        return None if self.cv is None else self.cv.wer - self.dev_wer

    def search_record(self) -> dict[str, Any]:
        """How the weights were found, for the weights file's provenance: the search
        method, the weights it tuned, the dev result and every setting (grids, seed,
        folds, restarts, bounds)."""
        return {"search": self.search, "tuned": list(self.tuned), "dev_wer": self.dev_wer,
                "dev_errors": self.dev_errors, "settings": dict(self.settings)}

    def to_dict(self) -> dict[str, Any]:
        """The contract's tune JSON keys, then extras (acoustic scale, cv, depth, surface)."""
        out: dict[str, Any] = {
            "lm_weight": self.weights.lm_weight,
            "insertion_penalty": self.weights.insertion_penalty,
            "features": dict(self.weights.features),
            "dev_errors": self.dev_errors,
            "dev_wer": self.dev_wer,
            "baseline_wer": self.baseline_wer,
            "oracle_wer": self.oracle_wer,
            "search": self.search,
            "acoustic_scale": self.weights.acoustic_scale,
            "tuned": list(self.tuned),
            "reference_words": self.reference_words,
            "utterances": self.utterances,
            "settings": dict(self.settings),
            "cv_wer": self.cv_wer,
            "cv_gap": self.cv_gap,
            "cv": None if self.cv is None else self.cv.to_dict(),
            "cv_warning": self.cv_warning,
            "edge_warning": self.edge_warning,
            "widenings": [w.to_dict() for w in self.widenings],
            "depth": [row.to_dict() for row in self.depth],
            "surface": None if self.surface is None else self.surface.to_dict(),
        }
        return out


# --------------------------------------------------------------------------- grids


def parse_grid(text: str, *, option: str = "grid") -> np.ndarray:
    """``"A:B:N"``: N evenly spaced points from A to B inclusive (N = 1 needs A = B)."""
    parts = text.split(":")
    if len(parts) != 3:
        raise UsageError(f"expected A:B:N (from A to B in N points), got {text!r}", field=option)
    try:
        lo, hi = float(parts[0]), float(parts[1])
    except ValueError:
        raise UsageError(f"A and B must be numbers, got {text!r}", field=option) from None
    try:
        n = int(parts[2])
    except ValueError:
        raise UsageError(f"N must be a whole number, got {parts[2]!r}", field=option) from None
    if not (math.isfinite(lo) and math.isfinite(hi)):
        raise UsageError(f"A and B must be finite, got {text!r}", field=option)
    if n < 1:
        raise UsageError(f"N must be at least 1, got {n}", field=option)
    if lo > hi:
        raise UsageError(f"A must not exceed B, got {lo:g} > {hi:g}", field=option)
    if n == 1 and lo != hi:
        raise UsageError(f"a 1-point grid needs A equal to B, got {text!r}", field=option)
    return np.linspace(lo, hi, n)


def parse_bounds(text: str, lm_column: str | None = LM) -> dict[str, tuple[float, float]]:
    """``"LM_LOW:LM_HIGH,PEN_LOW:PEN_HIGH"``: the exact search's box for the LM weight (of
    ``lm_column``) and the insertion penalty."""
    parts = text.split(",")
    if len(parts) != 2:
        raise UsageError(f"expected LM_LOW:LM_HIGH,PEN_LOW:PEN_HIGH, got {text!r}",
                         field="--bounds")
    out: dict[str, tuple[float, float]] = {}
    for name, part in zip((lm_column, WORDS), parts, strict=True):
        ends = part.split(":")
        try:
            lo, hi = (float(e) for e in ends) if len(ends) == 2 else (math.nan, math.nan)
        except ValueError:
            lo = hi = math.nan
        if not (math.isfinite(lo) and math.isfinite(hi) and lo < hi):
            raise UsageError(f"expected LOW:HIGH, two finite numbers with LOW below HIGH, "
                             f"got {part!r} (in {text!r}: LM_LOW:LM_HIGH,PEN_LOW:PEN_HIGH)",
                             field="--bounds")
        if name is not None:
            out[name] = (lo, hi)
    return out


def _default_grid(spec: tuple[float, float, int]) -> np.ndarray:
    return np.linspace(*spec)


def _as_grid(values: Sequence[float] | np.ndarray | None, default: tuple[float, float, int],
             what: str) -> np.ndarray:
    grid = _default_grid(default) if values is None else np.asarray(values, dtype=np.float64)
    if grid.ndim != 1 or grid.size == 0:
        raise UsageError("grid must be a non-empty list of numbers", field=what)
    if not np.isfinite(grid).all():
        raise UsageError("grid values must be finite", field=what)
    return grid


# --------------------------------------------------------------------------- shared checks


def _check_matrix(matrix: FeatureMatrix) -> tuple[np.ndarray, int]:
    if matrix.errors is None or matrix.ref_words is None:
        raise InputError("tuning needs a reference for every utterance")
    if matrix.n_utterances == 0:
        raise InputError("no utterances to tune on")
    if np.any(np.diff(matrix.offsets) < 1):
        raise InputError("every utterance needs at least one hypothesis")
    if not np.isfinite(matrix.values).all():
        raise InputError("scores must be finite (NaN or infinite value in the feature matrix)")
    words = int(matrix.ref_words.sum())
    if words == 0:
        raise InputError(UNDEFINED_WER)
    return matrix.errors.astype(np.int64), words


def _column_index(matrix: FeatureMatrix, name: str) -> int:
    if name not in matrix.names:
        known = ", ".join(matrix.names)
        raise UsageError(f"no column {name!r} to tune; columns are {known}", field="tune")
    return matrix.names.index(name)


def _errors_at(matrix: FeatureMatrix, weights: Weights) -> int:
    assert matrix.errors is not None
    rows = choose(matrix, weights) + matrix.offsets[:-1]
    return int(matrix.errors[rows].sum())


def _first_errors(matrix: FeatureMatrix) -> int:
    assert matrix.errors is not None
    return int(matrix.errors[matrix.offsets[:-1]].sum())


def _oracle_errors(matrix: FeatureMatrix) -> int:
    assert matrix.errors is not None
    return int(matrix.errors[oracle_rows(matrix)].sum())


def _result(matrix: FeatureMatrix, weights: Weights, search: str, tuned: tuple[str, ...],
            surface: Surface | None, settings: Mapping[str, Any]) -> TuneResult:
    _, words = _check_matrix(matrix)
    # dev errors from the same choice ``apply`` makes, so the two can never disagree
    errors = _errors_at(matrix, weights)
    return TuneResult(
        weights=weights, dev_errors=errors, dev_wer=errors / words,
        baseline_wer=_first_errors(matrix) / words, oracle_wer=_oracle_errors(matrix) / words,
        reference_words=words, utterances=matrix.n_utterances, search=search, tuned=tuned,
        surface=surface, settings=dict(settings),
    )


def _set(weights: Weights, names: tuple[str, ...], updates: Mapping[str, float]) -> Weights:
    all_names = tuple(dict.fromkeys((ACOUSTIC, LM, WORDS, *names, *weights.features)))
    vec = weights.vector(all_names)
    for name, value in updates.items():
        vec[all_names.index(name)] = value
    out = Weights.from_vector(all_names, vec)
    # keep the feature map free of zero entries the caller never asked for
    feats = {k: v for k, v in out.features.items() if v != 0.0 or k in weights.features
             or k in updates}
    return replace(out, features=feats)


# --------------------------------------------------------------------------- grid search


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
    errors, _ = _check_matrix(matrix)
    lm_values = _as_grid(lm_grid, DEFAULT_LM_GRID, "lm_grid")
    pen_values = _as_grid(penalty_grid, DEFAULT_PENALTY_GRID, "penalty_grid")
    wi = _column_index(matrix, WORDS)
    vec = base.vector(matrix.names)
    vec[wi] = 0.0
    if lm_column is None:
        lm_values, lm = np.zeros(1), np.zeros(matrix.n_hypotheses)
    else:
        li = _column_index(matrix, lm_column)
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


# --------------------------------------------------------------------------- line search


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
    errors, _ = _check_matrix(matrix)
    d = np.zeros(len(matrix.names))
    for name, value in direction.items():
        d[_column_index(matrix, name)] = value
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
            raise UsageError(f"bad bounds {a!r}..{b!r} for {name!r}", field="bounds")
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
            candidates.append((_errors_of_vector(matrix, errors, w + end * d), rank, end))
    found, _, step = min(candidates)
    if found > current:
        return w, current
    trial = w + step * d
    trial[idx] = np.clip(trial[idx], lo, hi)
    actual = _errors_of_vector(matrix, errors, trial)
    # the check guards against rounding at near-ties
    return (trial, actual) if actual <= current else (w, current)


def _coordinate_ascent(matrix: FeatureMatrix, errors: np.ndarray, w: np.ndarray,
                       idx: np.ndarray, lo: np.ndarray, hi: np.ndarray,
                       rng: np.random.Generator) -> tuple[np.ndarray, int]:
    """Exact line searches along each tuned coordinate, sweep after sweep; when a sweep
    gains nothing, as many random directions; stop when those gain nothing either."""
    w = w.copy()
    current = _errors_of_vector(matrix, errors, w)
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


def _errors_of_vector(matrix: FeatureMatrix, errors: np.ndarray, w: np.ndarray) -> int:
    rows = segment_argmax(matrix.values @ w, matrix.offsets)
    return int(errors[rows].sum())


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
    errors, _ = _check_matrix(matrix)
    tuned = tuple(dict.fromkeys(tune))
    if not tuned:
        raise UsageError("nothing to tune", field="tune")
    names = tuple(dict.fromkeys((*matrix.names, *start.features)))
    idx = np.array([_column_index(matrix, t) for t in tuned])
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


# --------------------------------------------------------------------------- tune


def _search_units(method: str, lm_grid: np.ndarray) -> int:
    """Progress units of one search: a grid row each; the exact search adds a row-start
    line search per row and, spread over its runs, as many units again."""
    return len(lm_grid) * (1 if method == "grid" else 3)


_RESTARTS = 3


def _search(matrix: FeatureMatrix, method: str, features: tuple[str, ...],
            lm_grid: np.ndarray, pen_grid: np.ndarray, seed: int, lm_column: str | None,
            steps: Steps | None = None,
            bounds: Mapping[str, tuple[float, float]] | None = None) -> TuneResult:
    grid = grid_search(matrix, lm_grid=lm_grid, penalty_grid=pen_grid, lm_column=lm_column,
                       progress=steps)
    if method == "grid":
        return grid
    # start from the best two-weight grid point, so tuning a feature never loses on dev;
    # the centres of the grid's other low regions and the best cell of each grid edge are
    # further starts (a narrow valley between grid points, or a tie-broken edge, can hold
    # fewer errors than the best point of the grid)
    assert grid.surface is not None
    others = []
    cells = low_points(grid.surface.errors)
    cells += [c for c in edge_points(grid.surface.errors) if c not in cells]
    for i, j in cells[1:]:
        updates = {WORDS: float(grid.surface.penalty[j])}
        if lm_column is not None:
            updates[lm_column] = float(grid.surface.lm[i])
        others.append(_set(grid.weights, matrix.names, updates))
    if lm_column is not None:
        others += _row_starts(matrix, grid, lm_column, progress=steps, bounds=bounds)
    elif steps is not None:
        steps(len(lm_grid))
    runs = 1 + len(others) + _RESTARTS
    found = exact_search(matrix, tune=(*grid.tuned, *features), start=grid.weights, seed=seed,
                         also_from=others, restarts=_RESTARTS, bounds=bounds,
                         progress=None if steps is None else steps.spread(len(lm_grid), runs))
    settings = {**found.settings, "start": "grid", "lm_grid": grid.settings["lm_grid"],
                "penalty_grid": grid.settings["penalty_grid"]}
    return replace(found, settings=settings)


def _row_starts(matrix: FeatureMatrix, grid: TuneResult, lm_column: str, keep: int = 3,
                progress: Advance | None = None,
                bounds: Mapping[str, tuple[float, float]] | None = None) -> list[Weights]:
    """The best points of the grid's LM-weight rows with the penalty searched exactly.

    On each row an exact line search over the penalty (within its bounds) finds the
    best interval, which may lie between the grid's penalty values; the ``keep`` best rows
    give starting points.
    """
    assert grid.surface is not None and matrix.errors is not None
    errors = matrix.errors.astype(np.int64)
    lo, hi = _bounds_for((WORDS,), bounds)
    words = matrix.values[:, matrix.names.index(WORDS)]
    found = []
    for lw in grid.surface.lm:
        base = _set(grid.weights, matrix.names, {lm_column: float(lw), WORDS: 0.0})
        curve = _envelope_curve(matrix.values @ base.vector(matrix.names), words,
                                matrix.offsets, errors, float(lo[0]), float(hi[0]))
        step, e = _best_step(curve, float(lo[0]), float(hi[0]))
        found.append((e, float(lw), step))
        if progress is not None:
            progress(1)
    found.sort(key=lambda item: item[0])
    return [_set(grid.weights, matrix.names, {lm_column: lw, WORDS: step})
            for _, lw, step in found[:keep]]


def _folds(n_utt: int, k: int, seed: int) -> list[np.ndarray]:
    perm = np.random.default_rng(seed).permutation(n_utt)
    return [np.sort(part) for part in np.array_split(perm, k)]


def cross_validate(matrix: FeatureMatrix, *, search: str, features: Sequence[str] = (),
                   lm_grid: np.ndarray | None = None, penalty_grid: np.ndarray | None = None,
                   folds: int = 5, seed: int = 0, lm_column: str | None = LM,
                   steps: Steps | None = None,
                   bounds: Mapping[str, tuple[float, float]] | None = None
                   ) -> CrossValidation | None:
    """Tune on k-1 folds, count errors on the held-out one; ``None`` if k < 2 utterances.

    Utterances are shuffled with ``seed`` and split into k nearly equal folds (k capped at
    the number of utterances). The WER is all held-out errors over all reference words.
    """
    _check_matrix(matrix)
    assert matrix.ref_words is not None
    k = min(folds, matrix.n_utterances)
    if k < 2:
        return None
    lm_values = _as_grid(lm_grid, DEFAULT_LM_GRID, "lm_grid")
    pen_values = _as_grid(penalty_grid, DEFAULT_PENALTY_GRID, "penalty_grid")
    parts = _folds(matrix.n_utterances, k, seed)
    out: list[Fold] = []
    for held in parts:
        train = np.setdiff1d(np.arange(matrix.n_utterances), held)
        train_m = matrix.subset(train)
        if int(train_m.ref_words.sum()) == 0:  # type: ignore[union-attr]
            weights = Weights()
            if steps is not None:
                steps(_search_units(search, lm_values))
        else:
            weights = _search(train_m, search, tuple(features), lm_values, pen_values, seed,
                              lm_column, steps, bounds).weights
        test_m = matrix.subset(held)
        words = int(matrix.ref_words[held].sum())
        errs = _errors_at(test_m, weights)
        out.append(Fold(utterances=len(held), reference_words=words, errors=errs,
                        wer=errs / words if words else float("nan"), weights=weights))
    total_e = sum(f.errors for f in out)
    total_w = sum(f.reference_words for f in out)
    return CrossValidation(folds=tuple(out), errors=total_e, reference_words=total_w,
                           wer=total_e / total_w, seed=seed)


def depth_table(matrix: FeatureMatrix, weights: Weights) -> tuple[DepthRow, ...]:
    """One-best, tuned (at ``weights``, not re-tuned) and oracle WER for k = 1, 2, 5, 10, all."""
    _, words = _check_matrix(matrix)
    deepest = int(np.diff(matrix.offsets).max())
    depths = [k for k in DEPTHS if k < deepest] + [deepest]
    rows = []
    for k in depths:
        part = matrix.truncate(k)
        rows.append(DepthRow(
            depth=k, label="all" if k == deepest else str(k),
            one_best_wer=_first_errors(part) / words,
            tuned_wer=_errors_at(part, weights) / words,
            oracle_wer=_oracle_errors(part) / words,
        ))
    return tuple(rows)


def tune(
    matrix: FeatureMatrix,
    *,
    search: str | None = None,
    features: Sequence[str] = (),
    lm_grid: Sequence[float] | np.ndarray | None = None,
    penalty_grid: Sequence[float] | np.ndarray | None = None,
    folds: int = 5,
    seed: int = 0,
    cv_warn: float = 0.01,
    lm_column: str | None = LM,
    progress: Report | None = None,
    widen: bool = True,
    max_widenings: int = MAX_WIDENINGS,
    bounds: Mapping[str, tuple[float, float]] | None = None,
) -> TuneResult:
    """Tune LM weight, insertion penalty and any named ``features`` on a dev set.

    ``search`` defaults to ``"grid"`` when only the LM weight and penalty are tuned and to
    ``"exact"`` when features are too (the exact search starts from the best grid point).
    Default grid: LM weight 0 to 30 (121 points), penalty -20 to +20 per word (81 points),
    natural-log units. With the grid search and ``widen``, a grid whose fewest-errors region
    touches its edge is widened (see :func:`widen_grid`, at most ``max_widenings`` times,
    within ``bounds``); the final grid serves the cross-validation too. ``bounds`` (by
    column name) is the exact search's box. Adds a ``folds``-fold cross-validation
    (``folds < 2`` skips it), a warning when the cross-validated WER and the dev WER differ
    by more than ``cv_warn`` (absolute: 0.01 is one percentage point), a warning when the
    fewest-errors region still touches the grid's edge, and the depth table. ``progress``
    (see :mod:`rescore.progress`) counts grid rows and exact-search runs over the search
    and every fold.
    """
    feats = tuple(dict.fromkeys(features))
    for name in feats:
        if name in (ACOUSTIC, LM, WORDS, lm_column) or name not in matrix.names:
            known = [n for n in matrix.names if n not in (ACOUSTIC, LM, WORDS, lm_column)]
            raise UsageError(f"no feature {name!r} to tune; features here: "
                             f"{', '.join(known) or 'none'}", field="--feature")
    method = search if search is not None else ("exact" if feats else "grid")
    if method not in ("grid", "exact"):
        raise UsageError(f"unknown search {method!r}; expected grid or exact", field="--search")
    if method == "grid" and feats:
        raise UsageError("grid search tunes only the LM weight and insertion penalty; "
                         "use the exact search to tune features", field="--search")
    if not (math.isfinite(cv_warn) and cv_warn >= 0.0):
        raise UsageError(f"the warning threshold must be a number >= 0, got {cv_warn!r}",
                         field="--warn-cv-gap")
    lm_values = _as_grid(lm_grid, DEFAULT_LM_GRID, "--grid-lm")
    pen_values = _as_grid(penalty_grid, DEFAULT_PENALTY_GRID, "--grid-penalty")
    widenings: tuple[Widening, ...] = ()
    widened: TuneResult | None = None
    if method == "grid" and widen:
        widened, widenings = widen_grid(matrix, lm_values, pen_values, lm_column=lm_column,
                                        bounds=bounds, max_widenings=max_widenings,
                                        progress=progress)
        assert widened.surface is not None
        lm_values, pen_values = widened.surface.lm, widened.surface.penalty
    cv_searches = min(folds, matrix.n_utterances) if folds >= 2 else 0
    searches = cv_searches + (0 if widened is not None else 1)
    steps = Steps(progress, "tuning", searches * _search_units(method, lm_values))
    result = widened if widened is not None else _search(
        matrix, method, feats, lm_values, pen_values, seed, lm_column, steps, bounds)
    cv = cross_validate(matrix, search=method, features=feats, lm_grid=lm_values,
                        penalty_grid=pen_values, folds=folds, seed=seed,
                        lm_column=lm_column, steps=steps, bounds=bounds) if folds >= 2 else None
    steps.finish()
    warning = None
    if cv is not None and abs(cv.wer - result.dev_wer) > cv_warn:
        warning = (f"cross-validated WER {100 * cv.wer:.2f}% differs from the dev WER "
                   f"{100 * result.dev_wer:.2f}% by {100 * abs(cv.wer - result.dev_wer):.2f} "
                   f"points, more than {100 * cv_warn:g}: the weights may be fitted to this "
                   "dev set; use more dev utterances or tune fewer weights")
    settings = {**result.settings, "seed": seed, "folds": folds, "cv_warn": cv_warn,
                "widen": widen and method == "grid", "max_widenings": max_widenings}
    if bounds:
        settings["bounds"] = {k: [float(a), float(b)] for k, (a, b) in bounds.items()}
    edge = None
    if method == "grid":
        assert result.surface is not None
        sides = region_edges(result.surface.errors, lm_values, pen_values, lm_column)
        edge = grid_edge_warning(sides, why=_edge_reason(widen, widenings, max_widenings))
    return replace(result, cv=cv, cv_warning=warning, edge_warning=edge, settings=settings,
                   depth=depth_table(matrix, result.weights), widenings=widenings)


# --------------------------------------------------------------------------- grid widening

_SIDE_LABELS = {"lm_low": "lowest LM weight", "lm_high": "highest LM weight",
                "penalty_low": "lowest penalty", "penalty_high": "highest penalty"}
_SIDE_OPTION = {"lm_low": "--grid-lm", "lm_high": "--grid-lm", "penalty_low": "--grid-penalty",
                "penalty_high": "--grid-penalty"}


def region_edges(errors: np.ndarray, lm_grid: np.ndarray, penalty_grid: np.ndarray,
                 lm_column: str | None = LM) -> tuple[str, ...]:
    """The sides of the grid (``lm_low``, ``lm_high``, ``penalty_low``, ``penalty_high``)
    that some cell with the fewest errors lies on.

    LM weight 0 (no language model) is a natural lower end and never counted as an edge;
    an axis of one point has no edges.
    """
    best = errors == errors.min()
    sides = []
    if lm_column is not None and len(lm_grid) > 1:
        if lm_grid[0] > 0.0 and best[0].any():
            sides.append("lm_low")
        if best[-1].any():
            sides.append("lm_high")
    if len(penalty_grid) > 1:
        if best[:, 0].any():
            sides.append("penalty_low")
        if best[:, -1].any():
            sides.append("penalty_high")
    return tuple(sides)


def _extend(grid: np.ndarray, low: bool, high: bool, floor: float, ceiling: float
            ) -> np.ndarray:
    """``grid`` (evenly spaced) longer by half its span at each side asked for, in its own
    step, not past ``floor`` or ``ceiling``."""
    if len(grid) < 2 or not (low or high):
        return grid
    step = (grid[-1] - grid[0]) / (len(grid) - 1)
    if not step > 0.0:  # a grid of one repeated value has no step to widen by
        return grid
    add = max(1, (len(grid) - 1) // 2)
    # whole steps only, so the old points stay points of the new grid
    k_lo = min(add, math.floor((grid[0] - floor) / step + 1e-9)) if low else 0
    k_hi = min(add, math.floor((ceiling - grid[-1]) / step + 1e-9)) if high else 0
    k_lo, k_hi = max(k_lo, 0), max(k_hi, 0)
    if not (k_lo or k_hi):
        return grid
    return np.linspace(grid[0] - k_lo * step, grid[-1] + k_hi * step, len(grid) + k_lo + k_hi)


def widen_grid(matrix: FeatureMatrix, lm_grid: np.ndarray, penalty_grid: np.ndarray, *,
               lm_column: str | None = LM,
               bounds: Mapping[str, tuple[float, float]] | None = None,
               max_widenings: int = MAX_WIDENINGS, progress: Report | None = None
               ) -> tuple[TuneResult, tuple[Widening, ...]]:
    """Grid search, widening the grid while the fewest-errors region touches its edge.

    Each widening adds half the axis's span (in the grid's own step) at every side the
    region touched, never beyond the exact search's box (``bounds``; by default LM weight
    0..100 and penalty -100..100), at most ``max_widenings`` times. Returns the search on
    the last grid and the widenings made; each is also logged and reported to
    ``progress`` as a stage of its own.
    """
    lm_lo, lm_hi = _bounds_for((LM if lm_column is None else lm_column,), bounds)
    pen_lo, pen_hi = _bounds_for((WORDS,), bounds)
    done: list[Widening] = []
    while True:
        stage = "grid search" if not done else f"grid search (widened {len(done)})"
        steps = Steps(progress, stage, len(lm_grid) if lm_column is not None else 1)
        result = grid_search(matrix, lm_grid=lm_grid, penalty_grid=penalty_grid,
                             lm_column=lm_column, progress=steps)
        steps.finish()
        assert result.surface is not None
        sides = region_edges(result.surface.errors, lm_grid, penalty_grid, lm_column)
        if not sides or len(done) >= max_widenings:
            return result, tuple(done)
        new_lm = _extend(lm_grid, "lm_low" in sides, "lm_high" in sides, float(lm_lo[0]),
                         float(lm_hi[0])) if lm_column is not None else lm_grid
        new_pen = _extend(penalty_grid, "penalty_low" in sides, "penalty_high" in sides,
                          float(pen_lo[0]), float(pen_hi[0]))
        if len(new_lm) == len(lm_grid) and len(new_pen) == len(penalty_grid):
            return result, tuple(done)  # at the box on every side touched
        lm_grid, penalty_grid = new_lm, new_pen
        done.append(Widening(sides=sides, dev_errors=result.dev_errors,
                             lm_grid=_spec(lm_grid), penalty_grid=_spec(penalty_grid)))
        log.info("%s", done[-1].describe())


def _spec(grid: np.ndarray) -> tuple[float, float, int]:
    return float(grid[0]), float(grid[-1]), len(grid)


def _edge_reason(widen: bool, widenings: Sequence[Widening], max_widenings: int) -> str:
    if not widen:
        return "--no-widen kept the grid fixed"
    if len(widenings) >= max_widenings:
        return f"after {len(widenings)} widenings, the most allowed"
    return "the grid reached the search box (--bounds)"


def grid_edge_warning(sides: Sequence[str], *, why: str = "") -> str | None:
    """A warning when the fewest-errors region touches the grid's edge (``sides`` from
    :func:`region_edges`): the fewest errors may then lie beyond the grid."""
    if not sides:
        return None
    options = sorted({_SIDE_OPTION[s] for s in sides})
    reason = f" ({why})" if why else ""
    return (f"the fewest-errors region touches the grid's "
            f"{', '.join(_SIDE_LABELS[s] for s in sides)}{reason}, so the best weights may "
            f"lie beyond it; widen {' and '.join(options)}")


# --------------------------------------------------------------------------- weights file

_WEIGHT_KEYS = ("acoustic_scale", "lm_weight", "insertion_penalty")
_FILE_KEYS = (*_WEIGHT_KEYS, "features", "provenance")


def _weights_dict(weights: Weights) -> dict[str, Any]:
    return {"acoustic_scale": weights.acoustic_scale, "lm_weight": weights.lm_weight,
            "insertion_penalty": weights.insertion_penalty, "features": dict(weights.features)}


def _number(value: object, path: str, name: str) -> float:
    if isinstance(value, bool) or not isinstance(value, int | float):
        raise InputError(f"expected a number, got {json.dumps(value)}", path=path, field=name)
    if not math.isfinite(value):
        raise InputError("must be a finite number", path=path, field=name)
    return float(value)


def _reject_constant(token: str) -> float:
    raise ValueError(f"{token} is not a number in JSON")


def read_weights(path: str | Path) -> Weights:
    """Read a weights file, strictly: unknown keys, non-numbers and NaN are errors."""
    where = str(path)
    try:
        data = read_json(path, WEIGHTS_FILE_LIMIT, parse_constant=_reject_constant)
    except ValueError as exc:  # NaN or Infinity
        raise InputError(str(exc), path=where) from None
    if not isinstance(data, dict):
        raise InputError("expected a JSON object", path=where)
    unknown = sorted(set(data) - set(_FILE_KEYS))
    if unknown:
        raise InputError(f"unknown key; expected {', '.join(_FILE_KEYS)}", path=where,
                         field=unknown[0])
    for key in _WEIGHT_KEYS:
        if key not in data:
            raise InputError("missing", path=where, field=key)
    values = {key: _number(data[key], where, key) for key in _WEIGHT_KEYS}
    raw = data.get("features", {})
    if not isinstance(raw, dict):
        raise InputError("expected an object of feature weights", path=where, field="features")
    feats: dict[str, float] = {}
    for name, value in raw.items():
        if name in (ACOUSTIC, LM, WORDS):
            raise InputError(f"{name!r} is a reserved column, not a feature", path=where,
                             field=f"features.{name}")
        feats[name] = _number(value, where, f"features.{name}")
    if "provenance" in data and not isinstance(data["provenance"], dict):
        raise InputError("expected an object", path=where, field="provenance")
    return Weights(acoustic_scale=values["acoustic_scale"], lm_weight=values["lm_weight"],
                   insertion_penalty=values["insertion_penalty"], features=feats)


def read_weights_models(path: str | Path) -> dict[str, str]:
    """The SHA-256 of each model the weights were tuned with, by name, as the weights
    file's provenance records them (empty when it records none)."""
    where = str(path)
    try:
        data = read_json(path, WEIGHTS_FILE_LIMIT, parse_constant=_reject_constant)
    except ValueError as exc:
        raise InputError(str(exc), path=where) from None
    prov = data.get("provenance") if isinstance(data, dict) else None
    models = prov.get("models") if isinstance(prov, dict) else None
    if not isinstance(models, dict):
        return {}
    out = {}
    for name, record in models.items():
        digest = record.get("sha256") if isinstance(record, dict) else None
        if not isinstance(digest, str):
            raise InputError("expected the model's sha256 as a string", path=where,
                             field=f"provenance.models.{name}.sha256")
        out[str(name)] = digest
    return out


def write_weights(path: str | Path, weights: Weights, provenance: Mapping[str, Any]) -> None:
    """Write a weights file atomically (nothing appears at ``path`` on failure)."""
    write_text_atomic(path, weights_text(path, weights, provenance))


def weights_text(path: str | Path, weights: Weights, provenance: Mapping[str, Any]) -> str:
    """The text of the weights file to be written at ``path`` (named in its errors)."""
    body = _weights_dict(weights)
    for key in _WEIGHT_KEYS:
        _number(body[key], str(path), key)
    for name, value in body["features"].items():
        _number(value, str(path), f"features.{name}")
    return json.dumps({**body, "provenance": dict(provenance)}, indent=2, sort_keys=False,
                      allow_nan=False) + "\n"
