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
from functools import cached_property
from itertools import chain, repeat

import numpy as np
import numpy.typing as npt

from rescore.errors import UsageError
from rescore.lm.hashindex import build_slots, lookup_values, slot_keys
from rescore.text import BlockWords, Words, block_words, word_counts

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

    @cached_property
    def packed(self) -> PackedWords:
        """The short words' look-up for clean blocks of text (built on first use)."""
        return PackedWords.of(self.words)

    def id_of(self, word: str) -> int:
        """The id of ``word``; unknown words (and the literal ``<s>``/``</s>``) are ``<unk>``."""
        i = self.index.get(word, UNK_ID)
        return UNK_ID if i in (BOS_ID, EOS_ID) else i


PACKED_BYTES = 8  # words of up to 8 UTF-8 bytes are looked up as one uint64, no str made
_LOW_BYTES = np.array([(1 << (8 * n)) - 1 for n in range(PACKED_BYTES)] + [(1 << 64) - 1],
                      dtype=np.uint64)
U64 = npt.NDArray[np.uint64]


def _packed_at(data: bytes, starts: I64, lengths: I64) -> U64:
    """Each word's bytes (``lengths`` at most 8) as a little-endian uint64, zero-padded:
    for words without a NUL byte a key equal for equal words and for them only."""
    padded = np.frombuffer(data + bytes(PACKED_BYTES), dtype=np.uint8)
    # every byte offset as the start of an unaligned 8-byte word (a view, nothing copied)
    at = np.ndarray((len(data),), dtype="<u8", buffer=padded, strides=(1,))
    return at[starts] & _LOW_BYTES[np.minimum(lengths, PACKED_BYTES)]


@dataclass(frozen=True)
class PackedWords:
    """A hash index from the packed bytes of the vocabulary's short words to their ids.

    Words of more than 8 bytes (and any with a NUL byte, whose packing is ambiguous) are
    left to the vocabulary's dict.
    """

    held: U64  # the key in each slot (NO_KEY where empty)
    ids: I32  # the id of the word in each slot (<unk> where empty)

    @classmethod
    def of(cls, words: Sequence[str]) -> PackedWords:
        raw = [w.encode("utf-8") for w in words]
        short = np.array([i for i, r in enumerate(raw) if len(r) <= PACKED_BYTES
                          and b"\0" not in r], dtype=np.int64)
        blob = b"".join(raw[i] for i in short)
        lengths = np.array([len(raw[i]) for i in short], dtype=np.int64)
        starts = np.cumsum(lengths) - lengths
        keys = _packed_at(blob, starts, lengths) if len(short) else np.zeros(0, np.uint64)
        slots = build_slots(keys)
        ids = np.where(slots >= 0, short[np.maximum(slots, 0)] if len(short) else 0, UNK_ID)
        return cls(slot_keys(slots, keys), ids.astype(np.int32))


def _by_dict(clean: bytes, starts: I64, lengths: I64) -> npt.NDArray[np.bool_]:
    """The words that a packed key does not identify: the long ones and any with a NUL."""
    long = lengths > PACKED_BYTES
    if b"\0" in clean:  # a NUL is never a separator: it lies inside the word begun before
        nul = np.flatnonzero(np.frombuffer(clean, dtype=np.uint8) == 0)
        long[np.searchsorted(starts, nul, side="right") - 1] = True
    return long


def _strings(clean: bytes, found: BlockWords, which: I64) -> list[str]:
    return [clean[a:b].decode("utf-8") for a, b in
            zip(found.starts[which].tolist(), found.ends[which].tolist(), strict=True)]


def encode_block(vocab: Vocabulary, clean: bytes) -> tuple[I32, I64]:
    """The ids of the words of a clean block (see :func:`rescore.text.normalise_block`) and
    the number of words on each of its lines; unknown words (and the literal ``<s>`` and
    ``</s>``) are ``<unk>``, as in :func:`encode`.

    Short words go through the vectorised index, the rest (the longer words, fewer in
    most text) through the vocabulary's dict: no str is made for a short word.
    """
    found = block_words(clean)
    lengths = found.ends - found.starts
    packed = vocab.packed
    # every word packed (a long one's key is only its first 8 bytes), then the dict's
    # words' ids set right below
    ids = lookup_values(packed.held, packed.ids, _packed_at(clean, found.starts, lengths),
                        UNK_ID)
    rest = np.flatnonzero(_by_dict(clean, found.starts, lengths))
    if rest.size:
        get = vocab.index.get
        ids[rest] = [get(w, UNK_ID) for w in _strings(clean, found, rest)]
    ids[ids <= EOS_ID] = UNK_ID
    return ids, found.counts


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


def first_pass_blocks(blocks: Iterable[bytes]) -> tuple[list[str], I64, I32, I64]:
    """As :func:`first_pass`, over clean blocks of text (empty lines are no sentences).

    A block's short words are told apart by their packed keys, as numpy operations: one
    dict probe per distinct key a block holds, not per word. The provisional ids come in
    another order than :func:`first_pass` gives; nothing downstream depends on it
    (:func:`choose_words` orders by count, then by the word).
    """
    provisional: dict[str, int] = {w: i for i, w in enumerate(SPECIALS)}
    by_key: dict[int, int] = {}
    bodies: list[I32] = []
    all_lengths: list[I64] = []
    for clean in blocks:
        found = block_words(clean)
        lengths = found.ends - found.starts
        ids = np.empty(len(lengths), dtype=np.int32)
        by_dict = _by_dict(clean, found.starts, lengths)
        short = np.flatnonzero(~by_dict)
        if short.size:
            keys, inverse = np.unique(_packed_at(clean, found.starts[short], lengths[short]),
                                      return_inverse=True)
            known = [by_key.get(k, -1) for k in keys.tolist()]
            for j, key in enumerate(keys.tolist()):
                if known[j] < 0:  # a new word: its bytes are its key's, zeros dropped
                    word = key.to_bytes(PACKED_BYTES, "little").rstrip(b"\0").decode("utf-8")
                    # a SPECIAL may be in the dict already
                    known[j] = by_key[key] = provisional.setdefault(word, len(provisional))
            ids[short] = np.array(known, dtype=np.int32)[inverse]
        rest = np.flatnonzero(by_dict)
        if rest.size:
            ids[rest] = [provisional.setdefault(w, len(provisional))
                         for w in _strings(clean, found, rest)]
        bodies.append(ids)
        all_lengths.append(found.counts[found.counts > 0])
    words = list(provisional)
    body = np.concatenate(bodies) if bodies else np.zeros(0, dtype=np.int32)
    counts = np.bincount(body, minlength=len(words)).astype(np.int64)
    lens = np.concatenate(all_lengths) if all_lengths else np.zeros(0, dtype=np.int64)
    return words, counts, body, lens


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


def oov_counts(vocab: Vocabulary, sentences: Sequence[Sequence[str]]) -> I64:
    """Per sentence, the number of its words outside ``vocab``: those :func:`encode` maps
    to ``<unk>`` (the literal reserved words among them); shape (n,)."""
    lens = word_counts(sentences)
    flat = sentences.flat if isinstance(sentences, Words) else chain.from_iterable(sentences)
    ids = np.fromiter(map(vocab.index.get, flat, repeat(UNK_ID)), dtype=np.int32,
                      count=int(lens.sum()))
    sentence_of = np.repeat(np.arange(len(lens)), lens)
    return np.bincount(sentence_of[ids <= UNK_ID], minlength=len(lens)).astype(np.int64)
