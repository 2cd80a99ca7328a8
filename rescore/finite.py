"""Scores that must stay finite: the combined total of every hypothesis, and the columns
a search may weight.

A weight of 1e308 times an LM score of -34, or a feature of -1.7e308 times 2, overflows to
infinity, and then the choice of the best hypothesis means nothing. The check is made
where the products are formed, so it is exact: no weights file is refused for what a
finite score could never make of it.
"""

from __future__ import annotations

from collections.abc import Sequence

import numpy as np

from rescore.errors import InputError
from rescore.limits import TUNING_SCORE_LIMIT
from rescore.scoring import FeatureMatrix
from rescore.weights import ACOUSTIC, ACOUSTIC_SCALE, INSERTION_PENALTY, LM, LM_WEIGHT, WORDS

_WEIGHT_NAMES = {ACOUSTIC: ACOUSTIC_SCALE, LM: LM_WEIGHT, WORDS: INSERTION_PENALTY}


def weight_name(column: str) -> str:
    """The weights file's name for the weight of ``column``."""
    return _WEIGHT_NAMES.get(column, f"features.{column}")


def check_totals(total: np.ndarray, m: FeatureMatrix, vector: np.ndarray, *, path: str,
                 lines: Sequence[int]) -> None:
    """Refuse a batch whose totals (``m.values @ vector``) are not all finite, naming the
    first such hypothesis, its utterance and the weight whose product overflowed."""
    bad = np.flatnonzero(~np.isfinite(total))
    if bad.size == 0:
        return
    row = int(bad[0])
    u = int(np.searchsorted(m.offsets, row, side="right")) - 1
    values = m.values[row]
    with np.errstate(over="ignore", invalid="ignore"):
        products = values * vector
    why = "the sum of its weighted scores overflows"
    for name, value, weight, product in zip(m.names, values.tolist(), vector.tolist(),
                                            products.tolist(), strict=True):
        if not np.isfinite(value):
            why = f"its {name} score is {value}"
            break
        if not np.isfinite(product):
            why = f"{weight_name(name)} {weight:g} times {name} {value:g} overflows"
            break
    raise InputError(f"utterance {m.ids[u]!r}: total is not finite: {why}; use smaller "
                     "weights", path=path or None, line=lines[u] if u < len(lines) else None,
                     field=f"hypotheses[{row - int(m.offsets[u])}].total")


def check_tunable(m: FeatureMatrix, columns: Sequence[str], *, path: str) -> None:
    """Refuse to search weights of columns holding a score beyond
    :data:`~rescore.limits.TUNING_SCORE_LIMIT` in size: the search tries weights up to its
    box's bounds and sums a handful of columns, which must stay finite."""
    for name in columns:
        if name not in m.names:
            continue
        column = np.abs(m.column(name))
        over = np.flatnonzero(~(column <= TUNING_SCORE_LIMIT))
        if over.size:
            row = int(over[0])
            u = int(np.searchsorted(m.offsets, row, side="right")) - 1
            raise InputError(
                f"utterance {m.ids[u]!r}: hypothesis {row - int(m.offsets[u])}: "
                f"{m.values[row, m.names.index(name)]:g} is beyond ±{TUNING_SCORE_LIMIT:g}, "
                "too large to weight without overflow; rescale the feature",
                path=path, field=name if name in _WEIGHT_NAMES else f"features.{name}")
