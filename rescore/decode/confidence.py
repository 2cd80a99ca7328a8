"""How well word confidences mean what they say, and a monotone map that makes them.

- :func:`word_correct`: which output words are correct, by one minimum-edit alignment
  against the reference (a word is correct when the alignment matches it to the same
  reference word).
- :func:`nce`: normalised cross entropy, ``(H(C) - H(C | conf)) / H(C)``, where ``H(C)`` is
  the entropy of correctness at the overall share of correct words and ``H(C | conf)`` the
  mean negative log-likelihood of each word's correctness under its confidence (the
  definition used in NIST's evaluations of word confidences). 1 is perfect, 0 no better
  than the overall share, negative worse than that.
- :func:`reliability`: equal-width confidence bins against observed accuracy, with the
  expected calibration error ``ECE = sum_b (n_b / N) |accuracy_b - mean confidence_b|``.
- :func:`review_curve`: reviewing words lowest confidence first, the share of words
  reviewed against the share of all errors caught.
- :class:`IsotonicCalibration`: isotonic regression by pool-adjacent-violators, fitted on
  dev, stored as two plain lists.
"""

from __future__ import annotations

import itertools
import math
from collections.abc import Mapping, Sequence
from dataclasses import dataclass
from typing import Any

import numpy as np
from rapidfuzz.distance import Levenshtein

from rescore.decode.words import Codebook

# confidences are kept inside [EPS, 1 - EPS] in the log-likelihoods: a confidence of
# exactly 0 or 1 on a word that proves it wrong would otherwise cost infinitely much
EPS = 1e-6
CALIBRATION_METHOD = "isotonic (pool-adjacent-violators)"


def word_correct(reference: Sequence[str], output: Sequence[str],
                 codebook: Codebook | None = None) -> np.ndarray:
    """One bool per output word: matched to the same reference word by one minimum-edit
    alignment."""
    book = codebook or Codebook()
    ref, hyp = book.encode(reference), book.encode(output)
    out = np.zeros(len(hyp), dtype=bool)
    for block in Levenshtein.opcodes(ref, hyp):
        if block.tag == "equal":
            out[block.dest_start:block.dest_end] = True
    return out


def _binary_entropy_total(correct: int, wrong: int) -> float:
    n = correct + wrong
    return -sum(k * math.log2(k / n) for k in (correct, wrong) if k)


def nce(confidences: np.ndarray, correct: np.ndarray) -> float | None:
    """Normalised cross entropy of confidences against correctness; None when every word
    is correct or every word wrong (``H(C) = 0``) or there are no words."""
    conf = np.clip(np.asarray(confidences, dtype=np.float64), EPS, 1.0 - EPS)
    right = np.asarray(correct, dtype=bool)
    n_right = int(right.sum())
    h_c = _binary_entropy_total(n_right, len(right) - n_right)
    if h_c == 0.0:
        return None
    h_given = -float(np.sum(np.where(right, np.log2(conf), np.log2(1.0 - conf))))
    return (h_c - h_given) / h_c


@dataclass(frozen=True)
class Reliability:
    """Per equal-width bin over [0, 1]: words, mean confidence and accuracy (NaN when a
    bin is empty); ``ece`` the expected calibration error over the non-empty bins."""

    edges: tuple[float, ...]
    counts: tuple[int, ...]
    mean_confidence: tuple[float, ...]
    accuracy: tuple[float, ...]
    ece: float

    def to_dict(self) -> dict[str, Any]:
        def clean(xs: tuple[float, ...]) -> list[float | None]:
            return [None if math.isnan(x) else x for x in xs]
        return {"edges": list(self.edges), "counts": list(self.counts),
                "mean_confidence": clean(self.mean_confidence),
                "accuracy": clean(self.accuracy), "ece": self.ece}


def reliability(confidences: np.ndarray, correct: np.ndarray, *, bins: int = 10,
                ) -> Reliability:
    """Reliability diagram and ECE; bin ``b`` holds ``b/bins <= conf < (b+1)/bins``, the
    last bin closed at 1."""
    if bins < 1:
        raise ValueError("bins must be at least 1")
    conf = np.asarray(confidences, dtype=np.float64)
    right = np.asarray(correct, dtype=np.float64)
    which = np.minimum((conf * bins).astype(np.int64), bins - 1)
    counts = np.bincount(which, minlength=bins)
    conf_sum = np.bincount(which, weights=conf, minlength=bins)
    right_sum = np.bincount(which, weights=right, minlength=bins)
    with np.errstate(invalid="ignore", divide="ignore"):
        mean_conf = conf_sum / counts
        accuracy = right_sum / counts
    filled = counts > 0
    total = int(counts.sum())
    ece = float(np.sum(counts[filled] * np.abs(accuracy[filled] - mean_conf[filled])) / total) \
        if total else 0.0
    return Reliability(edges=tuple(np.linspace(0.0, 1.0, bins + 1).tolist()),
                       counts=tuple(int(c) for c in counts),
                       mean_confidence=tuple(mean_conf.tolist()),
                       accuracy=tuple(accuracy.tolist()), ece=ece)


@dataclass(frozen=True)
class ReviewCurve:
    """``reviewed[k]`` = k / N words checked (lowest confidence first), ``caught[k]`` the
    share of all wrong words among them; both start at 0 and end at 1."""

    reviewed: np.ndarray
    caught: np.ndarray
    thresholds: np.ndarray

    def caught_at(self, share: float) -> float:
        """Share of errors caught when reviewing the given share of words (interpolated)."""
        return float(np.interp(share, self.reviewed, self.caught))


def review_curve(confidences: np.ndarray, correct: np.ndarray) -> ReviewCurve:
    """The review curve; ties in confidence are reviewed in input order. With no wrong
    words the caught share is 0 throughout; ``thresholds[k]`` is the confidence of the
    k-th word reviewed (k >= 1)."""
    conf = np.asarray(confidences, dtype=np.float64)
    wrong = ~np.asarray(correct, dtype=bool)
    order = np.argsort(conf, kind="stable")
    n = len(conf)
    errors = int(wrong.sum())
    cum = np.concatenate([[0], np.cumsum(wrong[order])]).astype(np.float64)
    caught = cum / errors if errors else np.zeros(n + 1)
    reviewed = np.arange(n + 1, dtype=np.float64) / max(n, 1)
    thresholds = np.concatenate([[0.0], conf[order]])
    return ReviewCurve(reviewed=reviewed, caught=caught, thresholds=thresholds)


def pool_adjacent_violators(y: np.ndarray, weights: np.ndarray | None = None) -> np.ndarray:
    """The non-decreasing sequence closest to ``y`` in weighted least squares."""
    y = np.asarray(y, dtype=np.float64)
    w = np.ones_like(y) if weights is None else np.asarray(weights, dtype=np.float64)
    means: list[float] = []
    masses: list[float] = []
    lengths: list[int] = []
    for value, weight in zip(y.tolist(), w.tolist(), strict=True):
        m, s, k = value, weight, 1
        while means and means[-1] > m:  # the new block violates order: pool it backwards
            pm, ps, pk = means.pop(), masses.pop(), lengths.pop()
            m = (pm * ps + m * s) / (ps + s)
            s += ps
            k += pk
        means.append(m)
        masses.append(s)
        lengths.append(k)
    return np.repeat(np.array(means), np.array(lengths, dtype=np.int64))


@dataclass(frozen=True)
class IsotonicCalibration:
    """A monotone map from raw posterior to probability of being correct.

    Fitted by isotonic regression (pool-adjacent-violators) of correctness on confidence
    over the distinct dev confidences; applied by linear interpolation between the knots,
    flat beyond them. ``x`` and ``y`` are plain lists for the weights file.
    """

    x: tuple[float, ...]
    y: tuple[float, ...]
    method: str = CALIBRATION_METHOD

    @classmethod
    def fit(cls, confidences: np.ndarray, correct: np.ndarray) -> IsotonicCalibration:
        conf = np.asarray(confidences, dtype=np.float64)
        right = np.asarray(correct, dtype=np.float64)
        if len(conf) == 0:
            raise ValueError("cannot fit a calibration map on no words")
        xs, inverse, counts = np.unique(conf, return_inverse=True, return_counts=True)
        means = np.bincount(inverse, weights=right) / counts
        fitted = pool_adjacent_violators(means, counts.astype(np.float64))
        keep = _knots(fitted)
        return cls(x=tuple(xs[keep].tolist()), y=tuple(fitted[keep].tolist()))

    def transform(self, confidences: np.ndarray) -> np.ndarray:
        out: np.ndarray = np.interp(np.asarray(confidences, dtype=np.float64),
                                    np.array(self.x), np.array(self.y))
        return out

    def to_dict(self) -> dict[str, Any]:
        return {"method": "isotonic", "x": list(self.x), "y": list(self.y)}

    @classmethod
    def from_dict(cls, data: Mapping[str, Any]) -> IsotonicCalibration:
        if data.get("method") != "isotonic":
            raise ValueError(f"unknown calibration method {data.get('method')!r}; "
                             "expected isotonic")
        x = [float(v) for v in data["x"]]
        y = [float(v) for v in data["y"]]
        if not x or len(x) != len(y):
            raise ValueError("calibration x and y must be non-empty and of equal length")
        if _decreasing(x) or _decreasing(y):
            raise ValueError("calibration x and y must be non-decreasing")
        return cls(x=tuple(x), y=tuple(y))


def _knots(fitted: np.ndarray) -> np.ndarray:
    """The first and last point of every constant run: interpolation between only these
    gives the same map as between all points."""
    n = len(fitted)
    change = np.flatnonzero(np.diff(fitted) != 0)
    starts = np.concatenate([[0], change + 1])
    ends = np.concatenate([change, [n - 1]])
    return np.unique(np.concatenate([starts, ends]))


def _decreasing(values: Sequence[float]) -> bool:
    return any(b < a for a, b in itertools.pairwise(values))
