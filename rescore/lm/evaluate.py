"""Perplexity, per-sentence scores and corpus reading: the measurements made with a model."""

from __future__ import annotations

import json
import math
from collections.abc import Iterable, Iterator, Sequence
from dataclasses import dataclass
from itertools import islice, pairwise
from pathlib import Path
from typing import Any

import numpy as np
import numpy.typing as npt

from rescore.lm.corpus import Corpus, read_corpus
from rescore.lm.model import NGramModel
from rescore.lm.vocab import UNK_ID, encode_block, stream_from_lengths
from rescore.outputs import atomic_output
from rescore.text import clean_words

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
            # the same total in natural-log units, and the cross entropy in bits per scored
            # token (log2 of the perplexity): -log10_prob / (tokens * log10 2)
            "ln_prob": _finite(self.log10_prob * math.log(10)),
            "bits_per_token": _finite(-self.log10_prob / (self.tokens * math.log10(2)))
            if self.tokens else None,
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
    """Score ``sentences`` (normalised token lists) in batches and sum up.

    Text read by :func:`read_corpus` is scored block by block straight from its bytes to
    ids, no word list made (the same figures, faster).
    """
    per_sentence: list[F64] = []
    n_tokens = n_oov = n_words = 0
    batches: Iterator[_Batch | _TextBatch] = _batches(model, sentences)
    if isinstance(sentences, Corpus) and sentences.unread:
        batches = _text_batches(model, sentences)
    for b in batches:
        n_words += int(b.words.sum())
        n_oov += int(b.oov.sum())
        n_tokens += int(b.tokens.sum())
        per_sentence.append(b.log10)
    log10s = np.concatenate(per_sentence) if per_sentence else np.zeros(0)
    return _result(log10s, n_tokens, n_oov, n_words)


@dataclass(frozen=True)
class _TextBatch:
    """One block of a text, scored: per sentence (non-blank line) its ``line`` number, and
    the figures of :class:`_Batch`; ``clean`` and ``counts`` give back its words."""

    lines: I64
    log10: F64
    words: I64
    tokens: I64
    oov: I64
    clean: bytes
    counts: I64

    def texts(self) -> list[str]:
        """Each sentence's normalised words, joined by single spaces."""
        words = clean_words(self.clean)
        flat, bounds = words.flat, words.bounds.tolist()
        return [" ".join(flat[a:b]) for a, b in pairwise(bounds) if b > a]


def _text_batches(model: NGramModel, corpus: Corpus) -> Iterator[_TextBatch]:
    vocab = model.vocab_
    for first_line, clean in corpus.blocks():
        ids, counts = encode_block(vocab, clean)
        sentences = np.flatnonzero(counts)
        words = counts[sentences]
        stream = stream_from_lengths(ids, words)
        logp = model.stream_logprob(stream)
        # each word's sentence, for the unknown words' count per sentence
        unknown = np.repeat(np.arange(len(words)), words)[ids == UNK_ID]
        oov = np.bincount(unknown, minlength=len(words)).astype(np.int64)
        tokens = words + 1 - (oov if model.closed_vocab else 0)
        yield _TextBatch(sentences + first_line, logp / LN10, words, tokens, oov, clean, counts)


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


def _char_scores(model: NGramModel, corpus: Corpus) -> Iterator[tuple[int, SentenceScore]]:
    """(line, score) of each sentence scored as its characters, spaces dropped: ``text``
    is its normalised words, ``words`` its characters (the unit's tokens)."""
    for first_line, clean in corpus.blocks():
        found = clean_words(clean)
        flat, bounds = found.flat, found.bounds.tolist()
        lines = [(first_line + i, flat[a:b]) for i, (a, b) in enumerate(pairwise(bounds))
                 if b > a]
        sentences = [[c for w in words for c in w] for _, words in lines]
        for (line, words), sc in zip(lines, sentence_scores(model, sentences), strict=True):
            yield line, SentenceScore(" ".join(words), sc.words, sc.tokens, sc.oov,
                                      sc.log10_prob)


def write_sentence_scores(model: NGramModel, text: str | Path, out: str | Path,
                          unit: str = "word") -> PerplexityResult:
    """Score ``text`` and write one JSON object per sentence to ``out``, atomically.

    Each line holds the sentence's ``line`` in ``text`` (blank lines are skipped, as in
    :func:`read_corpus`) and the keys of :meth:`SentenceScore.to_dict`. Returns the totals.
    ``unit="char"`` scores each sentence as its characters (a character model).
    """

    with atomic_output(out) as fh:

        def written() -> Iterator[SentenceScore]:
            if unit == "char":
                for line, sc in _char_scores(model, read_corpus(text)):
                    fh.write(json.dumps({"line": line, **sc.to_dict()}, ensure_ascii=False,
                                        allow_nan=False) + "\n")
                    yield sc
                return
            for b in _text_batches(model, read_corpus(text)):
                for i, (line, words) in enumerate(zip(b.lines.tolist(), b.texts(),
                                                      strict=True)):
                    sc = SentenceScore(words, int(b.words[i]), int(b.tokens[i]),
                                       int(b.oov[i]), float(b.log10[i]))
                    fh.write(json.dumps({"line": line, **sc.to_dict()}, ensure_ascii=False,
                                        allow_nan=False) + "\n")
                    yield sc

        return summarise(written())
