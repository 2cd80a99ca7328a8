"""The tuning driver: picks the search, restarts the line search from the grid's low points,
cross-validates and tabulates N-best depth."""

from __future__ import annotations

import math
from collections.abc import Mapping, Sequence
from dataclasses import replace

import numpy as np

from rescore.errors import ParameterError
from rescore.progress import Advance, Report, Steps
from rescore.scoring import DevMatrix, FeatureMatrix, chosen_errors
from rescore.tune.common import (
    DEFAULT_LM_GRID,
    DEFAULT_PENALTY_GRID,
    DEPTHS,
    MAX_WIDENINGS,
    _set,
)
from rescore.tune.grid import edge_points, grid_search, low_points
from rescore.tune.grids import _as_grid
from rescore.tune.line import _best_step, _bounds_for, _envelope_curve, exact_search
from rescore.tune.results import CrossValidation, DepthRow, Fold, TuneResult, Widening
from rescore.tune.widening import _edge_reason, grid_edge_warning, region_edges, widen_grid
from rescore.weights import ACOUSTIC, LM, WORDS, Weights


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
    assert grid.surface is not None
    errors = DevMatrix.check(matrix).word_errors
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
    matrix = DevMatrix.check(matrix)
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
        if train_m.words == 0:
            weights = Weights()
            if steps is not None:
                steps(_search_units(search, lm_values))
        else:
            weights = _search(train_m, search, tuple(features), lm_values, pen_values, seed,
                              lm_column, steps, bounds).weights
        test_m = matrix.subset(held)
        words = int(matrix.ref_words[held].sum())
        errs = chosen_errors(test_m, weights)
        out.append(Fold(utterances=len(held), reference_words=words, errors=errs,
                        wer=errs / words if words else float("nan"), weights=weights))
    total_e = sum(f.errors for f in out)
    total_w = sum(f.reference_words for f in out)
    return CrossValidation(folds=tuple(out), errors=total_e, reference_words=total_w,
                           wer=total_e / total_w, seed=seed)


def depth_table(matrix: FeatureMatrix, weights: Weights) -> tuple[DepthRow, ...]:
    """One-best, tuned (at ``weights``, not re-tuned) and oracle WER for k = 1, 2, 5, 10, all."""
    matrix = DevMatrix.check(matrix)
    words = matrix.words
    deepest = int(np.diff(matrix.offsets).max())
    depths = [k for k in DEPTHS if k < deepest] + [deepest]
    rows = []
    for k in depths:
        part = matrix.truncate(k)
        rows.append(DepthRow(
            depth=k, label="all" if k == deepest else str(k),
            one_best_wer=part.first_errors() / words,
            tuned_wer=chosen_errors(part, weights) / words,
            oracle_wer=part.oracle_errors() / words,
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
            raise ParameterError(f"no feature {name!r} to tune; features here: "
                                     f"{', '.join(known) or 'none'}", field="features")
    method = search if search is not None else ("exact" if feats else "grid")
    if method not in ("grid", "exact"):
        raise ParameterError(f"unknown search {method!r}; expected grid or exact", field="search")
    if method == "grid" and feats:
        raise ParameterError("grid search tunes only the LM weight and insertion penalty; "
                             "use the exact search to tune features", field="search")
    if not (math.isfinite(cv_warn) and cv_warn >= 0.0):
        raise ParameterError(f"the warning threshold must be a number >= 0, got {cv_warn!r}",
                             field="cv_warn")
    lm_values = _as_grid(lm_grid, DEFAULT_LM_GRID, "lm_grid")
    pen_values = _as_grid(penalty_grid, DEFAULT_PENALTY_GRID, "penalty_grid")
    # the dev set is checked here, once; every search, fold and depth below reuses it
    matrix = DevMatrix.check(matrix)
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
