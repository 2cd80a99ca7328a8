"""Posteriors of the hypotheses of each list from the combined score, and their scale.

``p(h) = exp(s * total(h)) / sum_g exp(s * total(g))`` over the hypotheses ``g`` of the
same list; utterance ``u`` owns rows ``offsets[u]:offsets[u + 1]``. The per-list maximum
is subtracted before exponentiating, so totals of thousands of nats never overflow.
"""

from __future__ import annotations

import math
from collections.abc import Callable
from dataclasses import dataclass

import numpy as np

# the golden-section refinement stops when the bracket is this narrow in log(s)
_LOG_TOLERANCE = 1e-6
# log-grid points per decade before the refinement
_GRID_PER_DECADE = 20
DEFAULT_SCALE_BOUNDS = (1e-4, 1e2)


def _check(totals: np.ndarray, offsets: np.ndarray) -> None:
    if totals.ndim != 1 or offsets.ndim != 1 or len(offsets) < 1:
        raise ValueError("totals and offsets must be 1-D")
    if offsets[0] != 0 or offsets[-1] != len(totals):
        raise ValueError(f"offsets must run from 0 to {len(totals)}")
    if np.any(np.diff(offsets) < 1):
        raise ValueError("every list needs at least one hypothesis")


def segment_log_normaliser(scores: np.ndarray, offsets: np.ndarray) -> np.ndarray:
    """``log sum exp`` of ``scores`` over each segment (one value per segment)."""
    starts = offsets[:-1]
    top = np.maximum.reduceat(scores, starts)
    sizes = np.diff(offsets)
    sums = np.add.reduceat(np.exp(scores - np.repeat(top, sizes)), starts)
    out: np.ndarray = top + np.log(sums)
    return out


def posteriors(totals: np.ndarray, offsets: np.ndarray, scale: float) -> np.ndarray:
    """Posterior of every hypothesis within its list.

    Parameters
    ----------
    totals : 1-D float array, the combined score of every hypothesis (all lists end to end).
    offsets : 1-D int array of length ``utterances + 1``; list ``u`` is rows
        ``offsets[u]:offsets[u + 1]``, each list holding at least one hypothesis.
    scale : the posterior scale ``s >= 0``; 0 gives a uniform posterior over each list.

    Returns
    -------
    A float array like ``totals`` whose entries sum to 1 over each list.

    Examples
    --------
    >>> posteriors(np.array([0.0, np.log(3.0)]), np.array([0, 2]), 1.0).round(2).tolist()
    [0.25, 0.75]
    """
    totals = np.asarray(totals, dtype=np.float64)
    offsets = np.asarray(offsets, dtype=np.int64)
    _check(totals, offsets)
    if not (math.isfinite(scale) and scale >= 0):
        raise ValueError(f"posterior scale must be finite and non-negative, not {scale}")
    if len(totals) == 0:
        return totals.copy()
    scaled = scale * totals
    log_z = segment_log_normaliser(scaled, offsets)
    out: np.ndarray = np.exp(scaled - np.repeat(log_z, np.diff(offsets)))
    return out


@dataclass(frozen=True)
class ScaleFit:
    """The fitted posterior scale and how it was found.

    ``log_likelihood`` is the summed log posterior mass of each dev list's fewest-error
    hypotheses at ``scale``; ``at_bound`` says the optimum sits on an end of ``bounds``
    (the data would have taken a more extreme scale).
    """

    scale: float
    log_likelihood: float
    bounds: tuple[float, float]
    at_bound: bool
    utterances: int
    method: str = "max-likelihood-of-oracle, log-grid + golden section"

    def to_dict(self) -> dict[str, object]:
        """Plain values for a weights file's provenance."""
        return {"scale": self.scale, "log_likelihood": self.log_likelihood,
                "bounds": list(self.bounds), "at_bound": self.at_bound,
                "utterances": self.utterances, "method": self.method}


def oracle_log_likelihood(totals: np.ndarray, offsets: np.ndarray, errors: np.ndarray,
                          scale: float) -> float:
    """Sum over lists of ``log sum_{h in O_u} p(h)``, ``O_u`` the fewest-error hypotheses."""
    sizes = np.diff(offsets)
    fewest = np.minimum.reduceat(errors, offsets[:-1])
    in_oracle = errors == np.repeat(fewest, sizes)
    scaled = scale * totals
    all_z = segment_log_normaliser(scaled, offsets)
    oracle_z = segment_log_normaliser(np.where(in_oracle, scaled, -np.inf), offsets)
    return float(np.sum(oracle_z - all_z))


def fit_posterior_scale(totals: np.ndarray, offsets: np.ndarray, errors: np.ndarray, *,
                        bounds: tuple[float, float] = DEFAULT_SCALE_BOUNDS) -> ScaleFit:
    """Fit the posterior scale on dev by maximum likelihood of the oracle hypotheses.

    The criterion is the log posterior mass that each list gives to its fewest-error
    hypotheses (all of them when several tie), summed over lists. We take it rather than
    minimum expected word errors against the reference because expected errors are
    usually smallest at ``s -> infinity`` whenever the top-scoring hypothesis beats the
    list's average (the posterior then collapses on the 1-best and says nothing about
    doubt), whereas the likelihood of the oracle penalises both over- and
    under-confidence and needs only the per-row errors tuning has already computed.
    Lists whose hypotheses all tie on errors carry no information and add 0.

    The search is one-dimensional in ``log s``: a log-grid of 20 points per decade over
    ``bounds`` (the criterion need not be unimodal when several hypotheses tie, so the
    grid finds the right basin), then golden-section search between the best grid point's
    neighbours down to a bracket of 1e-6 in ``log s``.

    Parameters
    ----------
    totals, offsets : as for :func:`posteriors`.
    errors : word errors of every row against its reference (``FeatureMatrix.errors``).
    bounds : ``(low, high)``, ``0 < low < high``.

    Returns
    -------
    ScaleFit

    Raises
    ------
    ValueError
        For bad bounds, mismatched shapes or no lists at all.
    """
    totals = np.asarray(totals, dtype=np.float64)
    offsets = np.asarray(offsets, dtype=np.int64)
    errors = np.asarray(errors)
    _check(totals, offsets)
    low, high = bounds
    if not (0 < low < high and math.isfinite(high)):
        raise ValueError(f"scale bounds must satisfy 0 < low < high, not {bounds}")
    if len(errors) != len(totals):
        raise ValueError(f"{len(errors)} error counts for {len(totals)} hypotheses")
    if len(totals) == 0:
        raise ValueError("no lists to fit the posterior scale on")

    def objective(log_s: float) -> float:
        return oracle_log_likelihood(totals, offsets, errors, math.exp(log_s))

    lo, hi = math.log(low), math.log(high)
    points = max(3, round((hi - lo) / math.log(10) * _GRID_PER_DECADE) + 1)
    grid = np.linspace(lo, hi, points)
    values = np.array([objective(float(g)) for g in grid])
    k = int(np.argmax(values))  # earliest on ties: the smallest, least confident scale
    a, b = float(grid[max(k - 1, 0)]), float(grid[min(k + 1, points - 1)])
    best_x, best_v = float(grid[k]), float(values[k])
    x, v = _golden_max(objective, a, b)
    if v > best_v:
        best_x, best_v = x, v
    at_bound = best_x <= lo + _LOG_TOLERANCE or best_x >= hi - _LOG_TOLERANCE
    return ScaleFit(scale=math.exp(best_x), log_likelihood=best_v, bounds=bounds,
                    at_bound=at_bound, utterances=len(offsets) - 1)


def _golden_max(f: Callable[[float], float], a: float, b: float) -> tuple[float, float]:
    """Golden-section search for the maximum of ``f`` on ``[a, b]``."""
    ratio = (math.sqrt(5.0) - 1.0) / 2.0
    c, d = b - ratio * (b - a), a + ratio * (b - a)
    fc, fd = f(c), f(d)
    while b - a > _LOG_TOLERANCE:
        if fc >= fd:
            b, d, fd = d, c, fc
            c = b - ratio * (b - a)
            fc = f(c)
        else:
            a, c, fc = c, d, fd
            d = a + ratio * (b - a)
            fd = f(d)
    x = (a + b) / 2.0
    return x, float(f(x))
