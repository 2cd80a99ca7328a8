"""The report's confidence section: how far the after system's word confidences can be
trusted, when its rescored file carries them (``apply --choose``, or weights with a
posterior scale).

Words are judged correct by one minimum-edit alignment against the reference
(:func:`rescore.decode.confidence.word_correct`); the measures are NCE, a reliability
diagram of ten equal-width bins with its expected calibration error, and the review curve
(share of errors caught when the words below a confidence threshold are checked).
"""

from __future__ import annotations

from collections.abc import Mapping
from dataclasses import dataclass
from pathlib import Path
from typing import Any

import numpy as np

from rescore.decode.confidence import Reliability, nce, reliability, review_curve, word_correct
from rescore.decode.words import Codebook
from rescore.nbest import iter_nbest
from rescore.report.load import is_nbest_file
from rescore.text import tokens

CONFIDENCE_CAUTION = (
    "These confidences are measured against this test set's references only: a calibration "
    "that holds here guarantees nothing on other audio. Check it on your own data before "
    "letting it decide which words a person reviews.")
REVIEW_SHARES = (0.05, 0.1, 0.2, 0.3, 0.5)


@dataclass(frozen=True)
class ConfidenceSummary:
    words: int
    accuracy: float
    nce: float | None
    reliability: Reliability
    review: tuple[tuple[float, float], ...]  # (share of words reviewed, share of errors caught)

    def to_dict(self) -> dict[str, Any]:
        r = self.reliability
        return {"words": self.words, "accuracy": self.accuracy, "nce": self.nce,
                "ece": r.ece,
                "reliability": [{"low": lo, "high": hi, "words": n,
                                 "mean_confidence": None if n == 0 else c,
                                 "accuracy": None if n == 0 else a}
                                for lo, hi, n, c, a in zip(r.edges[:-1], r.edges[1:], r.counts,
                                                           r.mean_confidence, r.accuracy,
                                                           strict=True)],
                "review": [{"reviewed": s, "errors_caught": c} for s, c in self.review],
                "caution": CONFIDENCE_CAUTION}


def load_confidences(path: str | Path, *, refs: Mapping[str, str] | None = None,
                     log_base: float | None = None,
                     costs: bool | None = None) -> ConfidenceSummary | None:
    """The summary of the word confidences in a rescored file; None when it has none (or
    is a transcript file)."""
    if not is_nbest_file(path):
        return None
    book = Codebook()
    conf: list[float] = []
    right: list[np.ndarray] = []
    for _, utt in iter_nbest(path, refs=refs, log_base=log_base, costs=costs,
                             require_references=True):
        pairs = utt.get("word_confidences")
        if pairs is None:
            return None
        conf.extend(c for _, c in pairs)
        right.append(word_correct(tokens(utt.get("reference", "")), [w for w, _ in pairs],
                                  book))
    if not conf:
        return None
    c = np.array(conf, dtype=np.float64)
    ok = np.concatenate(right)
    curve = review_curve(c, ok)
    return ConfidenceSummary(words=len(c), accuracy=float(ok.mean()), nce=nce(c, ok),
                             reliability=reliability(c, ok),
                             review=tuple((s, curve.caught_at(s)) for s in REVIEW_SHARES))


def confidence_rows(summary: ConfidenceSummary) -> tuple[list[str], list[list[str]]]:
    """The reliability table of the Markdown and HTML report (head, rows)."""
    rows = [[f"{b['low']:.1f}-{b['high']:.1f}", str(b["words"]),
             "-" if b["mean_confidence"] is None else f"{b['mean_confidence']:.3f}",
             "-" if b["accuracy"] is None else f"{b['accuracy']:.3f}"]
            for b in summary.to_dict()["reliability"]]
    return ["confidence bin", "words", "mean confidence", "observed accuracy"], rows


def confidence_lines(summary: ConfidenceSummary) -> list[str]:
    """The section's sentences: NCE, ECE and the review curve's points."""
    nce_text = "-" if summary.nce is None else f"{summary.nce:.3f}"
    review = "; ".join(f"{100 * s:.0f}% of words reviewed catch {100 * c:.1f}% of errors"
                       for s, c in summary.review)
    return [f"{summary.words} output words, {100 * summary.accuracy:.2f}% correct. "
            f"Normalised cross entropy {nce_text} (1 perfect, 0 no better than the overall "
            f"share, below 0 worse); expected calibration error {summary.reliability.ece:.3f}.",
            f"Reviewing the least confident words first: {review}."]
