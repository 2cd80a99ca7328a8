"""The vocabulary: words to integer ids, with the three reserved tokens first.

Ids 0, 1 and 2 are always ``<s>``, ``</s>`` and ``<unk>``; words follow, most frequent
first (ties in string order), so equal data gives equal ids. A corpus becomes one flat
int32 stream in which every sentence is ``<s> w1 ... wn </s>``.
"""

from __future__ import annotations

import array
from collections import defaultdict
from collections.abc import Iterable, Iterator, Sequence
from dataclasses import dataclass, field
from itertools import chain, repeat

import numpy as np
import numpy.typing as npt

from rescore.errors import UsageError
from rescore.text import Words, word_counts

BOS, EOS, UNK = "<s>", "</s>", "<unk>"
BOS_ID, EOS_ID, UNK_ID = 0, 1, 2
SPECIALS = (BOS, EOS, UNK)

I32 = npt.NDArray[np.int32]
I64 = npt.NDArray[np.int64]


@dataclass(frozen=True)
class Vocabulary:
    """Reserved tokens followed by the model's words; ``index`` maps each to its id."""

    words: tuple[str, ...]
    index: dict[str, int] = field(repr=False, compare=False)

    @classmethod
    def from_words(cls, words: Iterable[str]) -> Vocabulary:
        seen: dict[str, int] = {w: i for i, w in enumerate(SPECIALS)}
        for w in words:
            if w not in seen:
                seen[w] = len(seen)
        return cls(tuple(seen), seen)

    def __len__(self) -> int:
        return len(self.words)

    def id_of(self, word: str) -> int:
        """The id of ``word``; unknown words (and the literal ``<s>``/``</s>``) are ``<unk>``."""
        i = self.index.get(word, UNK_ID)
        return UNK_ID if i in (BOS_ID, EOS_ID) else i


@dataclass(frozen=True)
class Stream:
    """A padded corpus: ``tokens`` and, per position, the id of its sentence."""

    tokens: I32
    sentence_of: I64
    starts: I64  # position of each sentence's <s>

    @property
    def n_sentences(self) -> int:
        return len(self.starts)


def stream_from_lengths(body: I32, lengths: I64) -> Stream:
    """Insert ``<s>`` and ``</s>`` around each run of ``lengths`` tokens of ``body``."""
    n = len(lengths)
    padded = lengths + 2
    ends = np.cumsum(padded)
    starts = ends - padded
    tokens = np.empty(int(ends[-1]) if n else 0, dtype=np.int32)
    sentence_of = np.repeat(np.arange(n, dtype=np.int64), padded)
    is_bos = np.zeros(len(tokens), dtype=bool)
    is_bos[starts] = True
    is_eos = np.zeros(len(tokens), dtype=bool)
    is_eos[ends - 1] = True
    tokens[is_bos] = BOS_ID
    tokens[is_eos] = EOS_ID
    tokens[~(is_bos | is_eos)] = body
    return Stream(tokens, sentence_of, starts)


def encode(vocab: Vocabulary, sentences: Iterable[Sequence[str]]) -> tuple[Stream, int]:
    """The padded id stream of ``sentences`` and the number of out-of-vocabulary words."""
    sents = sentences if isinstance(sentences, Sequence) else list(sentences)
    lens = word_counts(sents)
    total = int(lens.sum())
    # one C-level dict probe per token: map() calls index.get(word, UNK_ID) without a frame
    flat = sents.flat if isinstance(sents, Words) else chain.from_iterable(sents)
    ids = np.fromiter(map(vocab.index.get, flat, repeat(UNK_ID)), dtype=np.int32, count=total)
    # the literal reserved words in text are unknown words, not sentence marks
    ids[ids <= EOS_ID] = UNK_ID
    oov = int(np.count_nonzero(ids == UNK_ID))
    return stream_from_lengths(ids, lens), oov


def _noting_lengths(sentences: Iterable[Sequence[str]], lengths: array.array[int]
                    ) -> Iterator[Sequence[str]]:
    for sent in sentences:
        lengths.append(len(sent))
        yield sent


def first_pass(sentences: Iterable[Sequence[str]]) -> tuple[list[str], I64, I32, I64]:
    """Read the corpus once: provisional word list, word counts, id body and lengths."""
    provisional: defaultdict[str, int] = defaultdict()
    provisional.default_factory = provisional.__len__  # a new word gets the next id
    for special in SPECIALS:
        provisional[special]
    lengths = array.array("q")
    # one C-level dict probe per token (a new word gets its id from __missing__); Python
    # runs once per sentence, only to note its length
    tokens_of = chain.from_iterable(_noting_lengths(sentences, lengths))
    ids = np.fromiter(map(provisional.__getitem__, tokens_of), dtype=np.int32)
    words = list(provisional)
    counts = np.bincount(ids, minlength=len(words)).astype(np.int64)
    lens = np.frombuffer(lengths, dtype=np.int64).copy() if len(lengths) else np.zeros(0, np.int64)
    return words, counts, ids, lens


def choose_words(
    words: Sequence[str],
    counts: I64,
    *,
    given: Iterable[str] | None,
    max_vocab: int | None,
    min_count: int,
) -> list[str]:
    """The model's words: ``given`` if set, else training words by count, filtered."""
    if given is not None:
        if max_vocab is not None or min_count != 1:
            raise UsageError("a given vocabulary cannot be combined with max_vocab or min_count")
        return [w for w in dict.fromkeys(given) if w not in SPECIALS]
    if max_vocab is not None and max_vocab < 0:
        raise UsageError(f"max_vocab must be at least 0, got {max_vocab}")
    if min_count < 1:
        raise UsageError(f"min_count must be at least 1, got {min_count}")
    cand = [(-int(counts[i]), w) for i, w in enumerate(words) if i >= len(SPECIALS)]
    cand = [c for c in cand if -c[0] >= min_count]
    cand.sort()
    if max_vocab is not None:
        cand = cand[:max_vocab]
    return [w for _, w in cand]


def remap(words: Sequence[str], vocab: Vocabulary) -> I32:
    """Map provisional ids (positions in ``words``) to vocabulary ids."""
    table = np.array([vocab.id_of(w) for w in words], dtype=np.int32)
    table[:len(SPECIALS)] = UNK_ID  # literal reserved words in text are unknown words
    return table
