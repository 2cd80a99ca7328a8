"""Perplexities compared like with like: the same tokens, the same vocabulary, said which.

A model's own perplexity (what ``lm perplexity`` prints) is measured over its own
vocabulary: every word it lacks is scored as ``<unk>``, which is one easy event, so a model
with a small vocabulary looks better than it is. Side by side, models are measured over one
shared vocabulary (the union of theirs), where each model's ``<unk>`` mass is shared among
the union words it lacks (the rule of :mod:`rescore.lm.mix`): then every figure counts the
same tokens and the same words as unknown.
"""

from __future__ import annotations

import math
from collections.abc import Sequence
from dataclasses import dataclass
from typing import Any

from rescore.lm.evaluate import PerplexityResult
from rescore.lm.vocab import SPECIALS, Vocabulary, oov_counts


@dataclass(frozen=True)
class SharedVocabulary:
    """Where shared-vocabulary figures were measured: ``words`` in the union (specials not
    counted), ``tokens`` scored (words and ``</s>``), ``oov`` words outside the union."""

    words: int
    tokens: int
    oov: int

    def to_dict(self) -> dict[str, int]:
        return {"words": self.words, "tokens": self.tokens, "oov": self.oov}

    def footnote(self, what: str) -> str:
        """One line saying what the shared-vocabulary figures count."""
        return (f"shared vocabulary: {self.tokens} tokens of {what}, one vocabulary "
                f"of {self.words} words (the union of the models'), {self.oov} tokens outside "
                "it scored as <unk>; own vocabulary: each model's own vocabulary, "
                "as 'lm perplexity' prints it")


@dataclass(frozen=True)
class LikeForLike:
    """Each model's own-vocabulary figures and its perplexity on the shared vocabulary."""

    own: tuple[PerplexityResult, ...]
    shared: tuple[float, ...]
    vocabulary: SharedVocabulary

    def to_dict(self) -> dict[str, Any]:
        return {
            "own_vocabulary": [p.to_dict() for p in self.own],
            "shared_vocabulary": {**self.vocabulary.to_dict(),
                                  "perplexities": [_finite(x) for x in self.shared]},
        }


def _finite(x: float) -> float | None:
    return x if math.isfinite(x) else None


def shared_vocabulary(union: Vocabulary, sentences: Sequence[Sequence[str]]
                      ) -> SharedVocabulary:
    """The note of a shared-vocabulary measurement of ``sentences`` over ``union``."""
    return SharedVocabulary(words=len(union.words) - len(SPECIALS),
                            tokens=sum(len(s) + 1 for s in sentences),
                            oov=int(oov_counts(union, sentences).sum()))


__all__ = ["LikeForLike", "SharedVocabulary", "shared_vocabulary"]
