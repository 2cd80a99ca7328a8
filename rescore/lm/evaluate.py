"""Perplexity, per-sentence scores and corpus reading: the measurements made with a model."""

from __future__ import annotations

import json
import math
from collections.abc import Callable, Iterable, Iterator, Sequence
from dataclasses import dataclass
from itertools import islice, tee
from pathlib import Path
from typing import Any

import numpy as np
import numpy.typing as npt

from rescore.errors import InputError
from rescore.lm.model import NGramModel
from rescore.outputs import atomic_output
from rescore.readers import iter_text_lines
from rescore.text import tokens

LN10 = math.log(10.0)
BATCH = 50_000  # sentences scored per vectorised call
F64 = npt.NDArray[np.float64]
I64 = npt.NDArray[np.int64]


def _finite(x: float) -> float | None:
    return x if math.isfinite(x) else None


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
        return {
            "perplexity": _finite(self.perplexity),
            "log10_prob": _finite(self.log10_prob),
            "sentences": self.sentences,
            "tokens": self.tokens,
            "oov": self.oov,
            "oov_rate": self.oov_rate,
        }


@dataclass(frozen=True)
class SentenceScore:
    """One sentence as :func:`perplexity` counts it: its normalised ``text``, ``words``,
    scored ``tokens`` (its words and ``</s>``, less OOV words for a closed vocabulary), ``oov``
    words and ``log10_prob`` (``</s>`` included; ``-inf`` for a zero probability)."""

    text: str
    words: int
    tokens: int
    oov: int
    log10_prob: float

    def to_dict(self) -> dict[str, Any]:
        return {"text": self.text, "words": self.words, "tokens": self.tokens, "oov": self.oov,
                "log10_prob": _finite(self.log10_prob)}


@dataclass(frozen=True)
class _Batch:
    sentences: list[Sequence[str]]
    log10: F64
    words: I64
    tokens: I64
    oov: I64


def _batches(model: NGramModel, sentences: Iterable[Sequence[str]]) -> Iterator[_Batch]:
    it = iter(sentences)
    in_vocab = model.vocab_.index
    while batch := list(islice(it, BATCH)):
        logp = model.logprob(batch)
        words = np.array([len(s) for s in batch], dtype=np.int64)
        # <s>, </s> and <unk> as words are outside the vocabulary too (ids 0..2)
        oov = np.array([sum(1 for w in s if in_vocab.get(w, 2) <= 2) for s in batch],
                       dtype=np.int64)
        tokens = words + 1 - (oov if model.closed_vocab else 0)
        yield _Batch(batch, logp / LN10, words, tokens, oov)


def _result(log10s: F64, n_tokens: int, n_oov: int, n_words: int) -> PerplexityResult:
    total = float(log10s.sum())
    ppl = 10.0 ** (-total / n_tokens) if n_tokens else float("nan")
    return PerplexityResult(
        perplexity=float(ppl), log10_prob=total, sentences=len(log10s), tokens=n_tokens,
        oov=n_oov, words=n_words, sentence_log10=tuple(float(x) for x in log10s),
    )


def perplexity(model: NGramModel, sentences: Iterable[Sequence[str]]) -> PerplexityResult:
    """Score ``sentences`` (normalised token lists) in batches and sum up."""
    per_sentence: list[F64] = []
    n_tokens = n_oov = n_words = 0
    for b in _batches(model, sentences):
        n_words += int(b.words.sum())
        n_oov += int(b.oov.sum())
        n_tokens += int(b.tokens.sum())
        per_sentence.append(b.log10)
    log10s = np.concatenate(per_sentence) if per_sentence else np.zeros(0)
    return _result(log10s, n_tokens, n_oov, n_words)


def sentence_scores(model: NGramModel, sentences: Iterable[Sequence[str]]
                    ) -> Iterator[SentenceScore]:
    """Each sentence's figures, in order, scored in the same batches as :func:`perplexity`."""
    for b in _batches(model, sentences):
        for i, s in enumerate(b.sentences):
            yield SentenceScore(" ".join(s), int(b.words[i]), int(b.tokens[i]), int(b.oov[i]),
                                float(b.log10[i]))


def summarise(scores: Iterable[SentenceScore]) -> PerplexityResult:
    """The perplexity figures of a run of sentence scores (equal to :func:`perplexity`'s)."""
    log10s: list[float] = []
    n_tokens = n_oov = n_words = 0
    for sc in scores:
        log10s.append(sc.log10_prob)
        n_tokens += sc.tokens
        n_oov += sc.oov
        n_words += sc.words
    return _result(np.array(log10s, dtype=np.float64), n_tokens, n_oov, n_words)


def write_sentence_scores(model: NGramModel, text: str | Path, out: str | Path
                          ) -> PerplexityResult:
    """Score ``text`` and write one JSON object per sentence to ``out``, atomically.

    Each line holds the sentence's ``line`` in ``text`` (blank lines are skipped, as in
    :func:`read_corpus`) and the keys of :meth:`SentenceScore.to_dict`. Returns the totals.
    """
    numbered, again = tee(read_corpus_lines(text))
    scores = sentence_scores(model, (words for _, words in numbered))

    with atomic_output(out) as fh:

        def written() -> Iterator[SentenceScore]:
            for (line, _), sc in zip(again, scores, strict=True):
                fh.write(json.dumps({"line": line, **sc.to_dict()}, ensure_ascii=False,
                                    allow_nan=False) + "\n")
                yield sc

        result = summarise(written())
        if not result.sentences:  # as read_corpus: no void figures, and no output file
            raise InputError("no sentences (every line is blank or has no words)", path=text)
        return result


def read_corpus(paths: str | Path | Iterable[str | Path], *,
                progress: Callable[[int], None] | None = None) -> Iterator[list[str]]:
    """One normalised sentence per non-blank line of each file (.gz read transparently).

    ``progress`` is called with the number of lines read since its last call (every few
    thousand lines and at the end of each file).
    """
    if isinstance(paths, (str, Path)):
        paths = [paths]
    paths = list(paths)
    sentences = 0
    for path in paths:
        number = reported = 0
        for number, line in iter_text_lines(path):
            words = tokens(line)
            if words:
                sentences += 1
                yield words
            if progress is not None and number - reported >= 4096:
                progress(number - reported)
                reported = number
        if progress is not None and number > reported:
            progress(number - reported)
    if not sentences:  # nothing to train on or measure: say so rather than give a void model
        raise InputError("no sentences (every line is blank or has no words)",
                         path=", ".join(str(p) for p in paths) or None)


def read_corpus_lines(path: str | Path) -> Iterator[tuple[int, list[str]]]:
    """``(line number, normalised words)`` for each non-blank line of one file."""
    for number, line in iter_text_lines(path):
        words = tokens(line)
        if words:
            yield number, words
