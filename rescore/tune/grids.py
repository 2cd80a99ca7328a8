"""The grids of the grid search: parsed from their text form, or the defaults."""

from __future__ import annotations

import math
from collections.abc import Sequence

import numpy as np

from rescore.errors import ParameterError
from rescore.weights import LM, WORDS


def parse_grid(text: str, *, option: str = "grid") -> np.ndarray:
    """``"A:B:N"``: N evenly spaced points from A to B inclusive (N = 1 needs A = B)."""
    parts = text.split(":")
    if len(parts) != 3:
        raise ParameterError(f"expected A:B:N (from A to B in N points), got {text!r}",
                             field=option)
    try:
        lo, hi = float(parts[0]), float(parts[1])
    except ValueError:
        raise ParameterError(f"A and B must be numbers, got {text!r}", field=option) from None
    try:
        n = int(parts[2])
    except ValueError:
        raise ParameterError(f"N must be a whole number, got {parts[2]!r}", field=option) from None
    if not (math.isfinite(lo) and math.isfinite(hi)):
        raise ParameterError(f"A and B must be finite, got {text!r}", field=option)
    if n < 1:
        raise ParameterError(f"N must be at least 1, got {n}", field=option)
    if lo > hi:
        raise ParameterError(f"A must not exceed B, got {lo:g} > {hi:g}", field=option)
    if n == 1 and lo != hi:
        raise ParameterError(f"a 1-point grid needs A equal to B, got {text!r}", field=option)
    return np.linspace(lo, hi, n)


def parse_bounds(text: str, lm_column: str | None = LM) -> dict[str, tuple[float, float]]:
    """``"LM_LOW:LM_HIGH,PEN_LOW:PEN_HIGH"``: the exact search's box for the LM weight (of
    ``lm_column``) and the insertion penalty."""
    parts = text.split(",")
    if len(parts) != 2:
        raise ParameterError(f"expected LM_LOW:LM_HIGH,PEN_LOW:PEN_HIGH, got {text!r}",
                             field="bounds")
    out: dict[str, tuple[float, float]] = {}
    for name, part in zip((lm_column, WORDS), parts, strict=True):
        ends = part.split(":")
        try:
            lo, hi = (float(e) for e in ends) if len(ends) == 2 else (math.nan, math.nan)
        except ValueError:
            lo = hi = math.nan
        if not (math.isfinite(lo) and math.isfinite(hi) and lo < hi):
            raise ParameterError(f"expected LOW:HIGH, two finite numbers with LOW below HIGH, "
                                 f"got {part!r} (in {text!r}: LM_LOW:LM_HIGH,PEN_LOW:PEN_HIGH)",
                                 field="bounds")
        if name is not None:
            out[name] = (lo, hi)
    return out


def _default_grid(spec: tuple[float, float, int]) -> np.ndarray:
    return np.linspace(*spec)


def _as_grid(values: Sequence[float] | np.ndarray | None, default: tuple[float, float, int],
             what: str) -> np.ndarray:
    grid = _default_grid(default) if values is None else np.asarray(values, dtype=np.float64)
    if grid.ndim != 1 or grid.size == 0:
        raise ParameterError("grid must be a non-empty list of numbers", field=what)
    if not np.isfinite(grid).all():
        raise ParameterError("grid values must be finite", field=what)
    return grid
