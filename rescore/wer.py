"""Word error counts and corpus WER (jiwer and rapidfuzz underneath).

Inputs are already-normalised word lists (see :mod:`rescore.text`). Corpus WER is total
errors over total reference words, never a mean of per-utterance rates.
"""

from __future__ import annotations

from collections.abc import Sequence
from dataclasses import asdict, dataclass

import jiwer
import numpy as np
from rapidfuzz.distance import Levenshtein


@dataclass(frozen=True)
class WerResult:
    """Corpus error counts; ``wer`` is (S + D + I) / reference words."""

    wer: float
    substitutions: int
    deletions: int
    insertions: int
    hits: int
    reference_words: int
    utterances: int

    @property
    def errors(self) -> int:
        return self.substitutions + self.deletions + self.insertions

    def to_dict(self) -> dict[str, float | int]:
        return asdict(self)


@dataclass(frozen=True)
class UtteranceCounts:
    """Per-utterance counts, one entry per utterance, in input order."""

    substitutions: np.ndarray
    deletions: np.ndarray
    insertions: np.ndarray
    hits: np.ndarray

    @property
    def errors(self) -> np.ndarray:
        return self.substitutions + self.deletions + self.insertions

    @property
    def reference_words(self) -> np.ndarray:
        return self.substitutions + self.deletions + self.hits


def align_counts(ref: Sequence[str], hyp: Sequence[str]) -> tuple[int, int, int, int]:
    """(substitutions, deletions, insertions, hits) of one minimum-edit alignment."""
    if not ref:
        return 0, 0, len(hyp), 0
    if not hyp:
        return 0, len(ref), 0, 0
    out = jiwer.process_words(" ".join(ref), " ".join(hyp))
    return int(out.substitutions), int(out.deletions), int(out.insertions), int(out.hits)


def word_errors(ref: Sequence[str], hyp: Sequence[str]) -> int:
    """Minimum number of word substitutions, deletions and insertions (edit distance)."""
    return int(Levenshtein.distance(list(ref), list(hyp)))


def utterance_counts(
    refs: Sequence[Sequence[str]], hyps: Sequence[Sequence[str]]
) -> UtteranceCounts:
    if len(refs) != len(hyps):
        raise ValueError(f"{len(refs)} references for {len(hyps)} hypotheses")
    table = np.zeros((4, len(refs)), dtype=np.int64)
    for i, (ref, hyp) in enumerate(zip(refs, hyps, strict=True)):
        table[:, i] = align_counts(ref, hyp)
    return UtteranceCounts(table[0], table[1], table[2], table[3])


def summarise(counts: UtteranceCounts) -> WerResult:
    s, d, i, h = (int(a.sum()) for a in (counts.substitutions, counts.deletions,
                                           counts.insertions, counts.hits))
    n = s + d + h
    return WerResult(
        wer=(s + d + i) / n if n else (0.0 if i == 0 else float("inf")),
        substitutions=s,
        deletions=d,
        insertions=i,
        hits=h,
        reference_words=n,
        utterances=len(counts.hits),
    )


def corpus_wer(refs: Sequence[Sequence[str]], hyps: Sequence[Sequence[str]]) -> WerResult:
    """Corpus WER of word lists paired by position."""
    return summarise(utterance_counts(refs, hyps))
