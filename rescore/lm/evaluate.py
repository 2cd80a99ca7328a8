"""Perplexity and corpus reading: the measurements made with a fitted model."""

from __future__ import annotations

import math
from collections.abc import Callable, Iterable, Iterator, Sequence
from dataclasses import dataclass
from itertools import islice
from pathlib import Path
from typing import Any

import numpy as np

from rescore.ioutil import iter_text_lines
from rescore.lm.model import NGramModel
from rescore.text import tokens

LN10 = math.log(10.0)
BATCH = 50_000  # sentences scored per vectorised call


@dataclass(frozen=True)
class PerplexityResult:
    """The contract's perplexity figures, plus each sentence's log10 probability.

    ``tokens`` counts every scored word and each ``</s>``, never ``<s>``; ``oov`` counts
    words outside the vocabulary (scored as ``<unk>`` by an open-vocabulary model, left
    out by a closed one); ``perplexity = 10 ** (-log10_prob / tokens)``.
    """

    perplexity: float
    log10_prob: float
    sentences: int
    tokens: int
    oov: int
    words: int
    sentence_log10: tuple[float, ...]

    @property
    def oov_rate(self) -> float:
        return self.oov / self.words if self.words else 0.0

    def to_dict(self) -> dict[str, Any]:
        """The contract's keys (non-finite numbers, from zero probabilities, become null)."""

        def finite(x: float) -> float | None:
            return x if math.isfinite(x) else None

        return {
            "perplexity": finite(self.perplexity),
            "log10_prob": finite(self.log10_prob),
            "sentences": self.sentences,
            "tokens": self.tokens,
            "oov": self.oov,
            "oov_rate": self.oov_rate,
        }


def perplexity(model: NGramModel, sentences: Iterable[Sequence[str]]) -> PerplexityResult:
    """Score ``sentences`` (normalised token lists) in batches and sum up."""
    per_sentence: list[np.ndarray[Any, Any]] = []
    n_tokens = n_oov = n_words = 0
    it = iter(sentences)
    while batch := list(islice(it, BATCH)):
        logp = model.logprob(batch)
        in_vocab = model.vocab_.index
        words = sum(len(s) for s in batch)
        oov = sum(1 for s in batch for w in s if in_vocab.get(w, 2) <= 2)
        n_words += words
        n_oov += oov
        n_tokens += words + len(batch) - (oov if model.closed_vocab else 0)
        per_sentence.append(logp / LN10)
    log10s = np.concatenate(per_sentence) if per_sentence else np.zeros(0)
    total = float(log10s.sum())
    ppl = 10.0 ** (-total / n_tokens) if n_tokens else float("nan")
    return PerplexityResult(
        perplexity=float(ppl), log10_prob=total, sentences=len(log10s), tokens=n_tokens,
        oov=n_oov, words=n_words, sentence_log10=tuple(float(x) for x in log10s),
    )


def read_corpus(paths: str | Path | Iterable[str | Path], *,
                progress: Callable[[int], None] | None = None) -> Iterator[list[str]]:
    """One normalised sentence per non-blank line of each file (.gz read transparently).

    ``progress`` is called with the number of lines read since its last call (every few
    thousand lines and at the end of each file).
    """
    if isinstance(paths, (str, Path)):
        paths = [paths]
    for path in paths:
        number = reported = 0
        for number, line in iter_text_lines(path):
            words = tokens(line)
            if words:
                yield words
            if progress is not None and number - reported >= 4096:
                progress(number - reported)
                reported = number
        if progress is not None and number > reported:
            progress(number - reported)
