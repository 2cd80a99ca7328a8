"""Tuning the weights of the combined score on a dev set: grid search and exact line search.

The package: ``results`` (what a run returns), ``grids`` (grid text and defaults),
``common`` (settings and the checks every search shares), ``grid`` (grid search),
``line`` (exact line search), ``widening`` (grid widening), ``driver`` (:func:`tune`).
Imports run in that order, each module only from those before it.

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

from rescore.tune.common import (
    DEFAULT_BOUND,
    DEFAULT_LM_GRID,
    DEFAULT_PENALTY_GRID,
    DEPTHS,
    MAX_WIDENINGS,
)
from rescore.tune.driver import cross_validate, depth_table, tune
from rescore.tune.grid import edge_points, grid_search, low_points, plateau_centre
from rescore.tune.grids import parse_bounds, parse_grid
from rescore.tune.line import ErrorCurve, exact_search, line_errors
from rescore.tune.results import (
    CrossValidation,
    DepthRow,
    Fold,
    Surface,
    TuneResult,
    TuningRecord,
    Widening,
)
from rescore.tune.widening import grid_edge_warning, region_edges, widen_grid

__all__ = [
    "DEFAULT_BOUND",
    "DEFAULT_LM_GRID",
    "DEFAULT_PENALTY_GRID",
    "DEPTHS",
    "MAX_WIDENINGS",
    "CrossValidation",
    "DepthRow",
    "ErrorCurve",
    "Fold",
    "Surface",
    "TuneResult",
    "TuningRecord",
    "Widening",
    "cross_validate",
    "depth_table",
    "edge_points",
    "exact_search",
    "grid_edge_warning",
    "grid_search",
    "line_errors",
    "low_points",
    "parse_bounds",
    "parse_grid",
    "plateau_centre",
    "region_edges",
    "tune",
    "widen_grid",
]
