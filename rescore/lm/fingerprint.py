"""A model's fingerprint of its training text (the overlap of test sentences with it is
:mod:`rescore.lm.overlap`).

The fingerprint is the sorted set of 64-bit hashes (XXH3-64) of the normalised training
sentences, each hashed as its words joined by one space (UTF-8). It costs 8 bytes per
distinct training sentence in the model file, and is the only record of the text a model
keeps: the n-gram tables cannot tell a sentence seen whole from one pieced together. With
2**64 values, a false match among n distinct sentences and m test sentences has a
probability of about n * m / 2**64 (a million of each: about 5e-8).

Every caller (``lm build``, ``lm mix``, ``report``, ``check``) hashes through
:func:`sentence_hash`, so the same words always give the same hash.
"""

from __future__ import annotations

from array import array
from collections.abc import Iterable, Iterator, Sequence

import numpy as np
import numpy.typing as npt
import xxhash

from rescore.arrays import U64

BYTES_PER_SENTENCE = 8


def sentence_hash(words: Sequence[str]) -> int:
    """XXH3-64 of the words joined by one space, as UTF-8."""
    return int(xxhash.xxh3_64_intdigest(" ".join(words).encode("utf-8")))


def fingerprint(sentences: Iterable[Sequence[str]]) -> U64:
    """Sorted unique hashes of the sentences."""
    hashes = array("Q", (sentence_hash(s) for s in sentences))
    return np.unique(np.frombuffer(hashes, dtype=np.uint64)) if hashes else np.zeros(
        0, np.uint64)


class Recorder:
    """Hashes each sentence an iterable yields as it passes (one pass over the text)."""

    def __init__(self, sentences: Iterable[Sequence[str]]) -> None:
        self._sentences = sentences
        self._hashes = array("Q")

    def __iter__(self) -> Iterator[Sequence[str]]:
        for s in self._sentences:
            self._hashes.append(sentence_hash(s))
            yield s

    def result(self) -> U64:
        return np.unique(np.frombuffer(self._hashes, dtype=np.uint64)) if self._hashes \
            else np.zeros(0, np.uint64)


class BlockRecorder:
    """Hashes each sentence of the clean blocks an iterable yields as they pass.

    A clean block (:func:`rescore.text.normalise_block`) holds one sentence a line, its
    words separated by one or more spaces; a line with no word is no sentence.
    """

    def __init__(self, blocks: Iterable[bytes]) -> None:
        self._blocks = blocks
        self._hashes = array("Q")

    def __iter__(self) -> Iterator[bytes]:
        digest = xxhash.xxh3_64_intdigest
        for block in self._blocks:
            self._hashes.extend(digest(b" ".join(words)) for line in block.split(b"\n")
                                if (words := line.split()))
            yield block

    def result(self) -> U64:
        return np.unique(np.frombuffer(self._hashes, dtype=np.uint64)) if self._hashes \
            else np.zeros(0, np.uint64)


def union(parts: Sequence[U64 | None]) -> U64 | None:
    """The fingerprint of the joined texts; None unless every part has one (a partial
    fingerprint would under-count a leak)."""
    if not parts or any(p is None for p in parts):
        return None
    return np.unique(np.concatenate([p for p in parts if p is not None]))


def contains(hashes: U64, queries: U64) -> npt.NDArray[np.bool_]:
    """Which queries are in the sorted ``hashes``."""
    if not len(hashes):
        return np.zeros(len(queries), dtype=bool)
    at = np.minimum(np.searchsorted(hashes, queries), len(hashes) - 1)
    found: npt.NDArray[np.bool_] = hashes[at] == queries
    return found
