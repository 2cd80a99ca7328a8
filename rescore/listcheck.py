"""What the N-best lists themselves say about how they were read: score convention and
list order, empty and duplicate hypotheses.

A log-likelihood is at most 0 for a probability and is negative for almost every real
utterance; a cost (a negative log-likelihood) is positive. So when nearly all acoustic
scores are positive after reading, the file most likely holds costs read as
log-likelihoods. Recognizers write their lists best first (by their own total, so the
acoustic score alone need not fall at every step, but it falls on the whole); a list whose
acoustic scores grow down the list (positive covariance with the position) is ordered
against its scores, which is what costs read as log-likelihoods look like too.
Thresholds (common practice, not law): :data:`POSITIVE_SHARE` of the acoustic scores
positive, or more than :data:`DISORDER_SHARE` of the lists (of two or more hypotheses
with different scores, at least :data:`MIN_LISTS` of them) ordered against their scores.
"""

from __future__ import annotations

from collections.abc import Sequence
from dataclasses import dataclass, fields
from typing import Any

import numpy as np

POSITIVE_SHARE = 0.95
DISORDER_SHARE = 0.5
MIN_LISTS = 10  # fewer lists with varied scores say too little about their order


@dataclass(frozen=True)
class ListStats:
    """Counts over a set of lists; add two to pool batches or shards."""

    acoustic_scores: int = 0
    positive_acoustic: int = 0
    ordered_lists: int = 0  # lists of two or more hypotheses whose scores are not all equal
    lists_out_of_order: int = 0  # of those, lists whose scores grow down the list
    empty_hypotheses: int = 0  # no words after normalisation
    duplicate_hypotheses: int = 0  # same words after normalisation as an earlier one

    def __add__(self, other: ListStats) -> ListStats:
        return ListStats(*(getattr(self, f.name) + getattr(other, f.name)
                           for f in fields(self)))

    @property
    def positive_share(self) -> float:
        return self.positive_acoustic / self.acoustic_scores if self.acoustic_scores else 0.0

    @property
    def out_of_order_share(self) -> float:
        return self.lists_out_of_order / self.ordered_lists if self.ordered_lists else 0.0

    def warnings(self, *, costs: bool = False) -> tuple[str, ...]:
        """The convention warnings these counts call for (``costs``: the file was read as
        costs, so its scores were negated on reading)."""
        out = []
        if self.acoustic_scores and self.positive_share >= POSITIVE_SHARE:
            how = ("although the file was read as costs: check --costs and the header"
                   if costs else "they look like costs read as log-likelihoods; if lower is "
                   "better in this file, give --costs")
            out.append(f"{self.positive_acoustic} of {self.acoustic_scores} acoustic scores "
                       f"({100 * self.positive_share:.1f}%) are positive log-likelihoods: "
                       + how)
        if self.ordered_lists >= MIN_LISTS and self.out_of_order_share > DISORDER_SHARE:
            out.append(f"{self.lists_out_of_order} of {self.ordered_lists} lists "
                       f"({100 * self.out_of_order_share:.1f}%) are ordered against their "
                       "acoustic scores (the scores grow down the list): check the score "
                       "convention (--costs, --log-base)")
        return tuple(out)

    def to_dict(self) -> dict[str, Any]:
        return {f.name: getattr(self, f.name) for f in fields(self)}


def score_stats(acoustic: np.ndarray, offsets: np.ndarray) -> ListStats:
    """Sign and order counts of the acoustic scores of lists ``offsets[u]:offsets[u+1]``.

    A list is ordered against its scores when its scores grow with the position in the
    list: their covariance with the position is positive.
    """
    n_utt = len(offsets) - 1
    sizes = np.diff(offsets)
    utt = np.repeat(np.arange(n_utt), sizes)
    position = np.arange(len(acoustic)) - np.repeat(offsets[:-1], sizes)
    centred = position - np.repeat((sizes - 1) / 2.0, sizes)
    cov = np.bincount(utt, weights=centred * acoustic, minlength=n_utt)
    varied = np.zeros(n_utt, dtype=bool)
    if len(acoustic):
        starts = offsets[:-1]
        varied = np.maximum.reduceat(acoustic, starts) > np.minimum.reduceat(acoustic, starts)
    return ListStats(acoustic_scores=len(acoustic),
                     positive_acoustic=int(np.count_nonzero(acoustic > 0)),
                     ordered_lists=int(np.count_nonzero(varied)),
                     lists_out_of_order=int(np.count_nonzero(varied & (cov > 0))))


def text_stats(tokens: Sequence[Sequence[str]], offsets: np.ndarray) -> ListStats:
    """Empty hypotheses and duplicates within a list (after normalisation)."""
    empty = sum(1 for t in tokens if not t)
    dups = 0
    for u in range(len(offsets) - 1):
        lst = [tuple(t) for t in tokens[int(offsets[u]):int(offsets[u + 1])]]
        dups += len(lst) - len(set(lst))
    return ListStats(empty_hypotheses=empty, duplicate_hypotheses=dups)
