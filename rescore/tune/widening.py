"""Grid widening: a grid whose fewest-errors region touches its edge is widened, and what to
tell the user when it still does."""

from __future__ import annotations

import logging
import math
from collections.abc import Mapping, Sequence

import numpy as np

from rescore.progress import Report, Steps
from rescore.scoring import DevMatrix, FeatureMatrix
from rescore.tune.common import MAX_WIDENINGS
from rescore.tune.grid import grid_search
from rescore.tune.line import _bounds_for
from rescore.tune.results import _SIDE_LABELS, TuneResult, Widening
from rescore.weights import LM, WORDS

log = logging.getLogger(__name__)

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
    matrix = DevMatrix.check(matrix)
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
