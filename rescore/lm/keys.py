"""Keys of n-grams for sorting and merging counts across chunks of a text.

A key orders n-grams as the count tables do (reversed lexicographic order of the word
ids): when ``order * bits(V)`` fits in 64 bits it packs the words into one uint64 (last
word in the high bits), otherwise it is a byte string of the word ids as big-endian
uint32, last word first, which numpy sorts and searches byte by byte.
"""

from __future__ import annotations

from collections.abc import Sequence
from dataclasses import dataclass
from typing import Any

import numpy as np
import numpy.typing as npt

from rescore.lm.counts import OrderCounts

I32 = npt.NDArray[np.int32]
I64 = npt.NDArray[np.int64]
Keys = npt.NDArray[Any]  # uint64 or fixed-width bytes


def table_keys(suffix: npt.NDArray[Any], first: npt.NDArray[Any], v: int
                ) -> npt.NDArray[np.uint64]:
    """The key of each n-gram in the tables: ``suffix id * V + first word``."""
    return suffix.astype(np.uint64) * np.uint64(v) + first.astype(np.uint64)


@dataclass(frozen=True)
class KeyCodec:
    """Keys of the n-grams of every order of one model (see the module's docstring)."""

    order: int
    vocab_size: int

    @property
    def bits(self) -> int:
        return max(int(self.vocab_size).bit_length(), 1)

    @property
    def packed(self) -> bool:
        return self.order * self.bits <= 64

    def dtype(self, k: int) -> np.dtype[Any]:
        return np.dtype(np.uint64) if self.packed else np.dtype(f"S{4 * k}")

    def unigrams(self) -> Keys:
        ids = np.arange(self.vocab_size, dtype=np.int64)
        return ids.astype(np.uint64) if self.packed else _be32(ids).view("S4").ravel()

    def extend(self, suffix_keys: Keys, first: I64) -> Keys:
        """Keys of the n-grams ``first + suffix`` (``suffix_keys`` one order lower)."""
        if self.packed:
            return (suffix_keys << np.uint64(self.bits)) | first.astype(np.uint64)
        n, width = len(first), suffix_keys.dtype.itemsize
        out = np.empty((n, width + 4), dtype=np.uint8)
        out[:, :width] = suffix_keys.view(np.uint8).reshape(n, width)
        out[:, width:] = _be32(first)
        return out.view(f"S{width + 4}").ravel()

    def split(self, keys: Keys) -> tuple[Keys, I64]:
        """The inverse of :meth:`extend`: the suffixes' keys and the first words."""
        if self.packed:
            return keys >> np.uint64(self.bits), (keys & np.uint64((1 << self.bits) - 1)
                                                  ).view(np.int64)
        n, width = len(keys), keys.dtype.itemsize
        raw = keys.view(np.uint8).reshape(n, width)
        first = np.ascontiguousarray(raw[:, width - 4:]).view(">u4").ravel().astype(np.int64)
        return np.ascontiguousarray(raw[:, :width - 4]).view(f"S{width - 4}").ravel(), first

    def from_words(self, words: I32) -> Keys:
        """Keys of n-grams given as rows of word ids ``w1 .. wk``."""
        n, k = words.shape
        if self.packed:
            keys = np.zeros(n, dtype=np.uint64)
            for j in range(k):
                keys |= words[:, j].astype(np.uint64) << np.uint64(self.bits * j)
            return keys
        return np.ascontiguousarray(words[:, ::-1]).astype(">u4").view(f"S{4 * k}").ravel()

    def keys_of(self, tables: Sequence[OrderCounts]) -> list[Keys]:
        """Each order's keys of count tables (sorted, as the tables are)."""
        keys = [self.unigrams()]
        for k in range(2, len(tables) + 1):
            t = tables[k - 1]
            keys.append(self.extend(keys[k - 2][t.suffix], t.first))
        return keys

    def tables_of(self, unigram_counts: I64, keys: list[Keys], counts: list[I64]
                  ) -> list[OrderCounts]:
        """Count tables from each order's merged keys and counts (index 0: orders >= 2).

        ``keys`` and ``counts`` are emptied as they are used (an order's keys are let go
        once the order above has found its suffixes among them), and the tables' ids are
        32-bit integers where they fit: the peak of a build comes soon after."""
        v = self.vocab_size
        tables = [OrderCounts(np.zeros(v, np.int64), np.arange(v, dtype=np.int64),
                              unigram_counts)]
        below = self.unigrams()
        for i in range(len(keys)):
            k_keys, k_counts = keys[i], counts[i]
            keys[i], counts[i] = k_keys[:0], k_counts[:0]
            suffix_keys, first = self.split(k_keys)
            suffix = narrow_ids(np.searchsorted(below, suffix_keys))
            del suffix_keys
            tables.append(OrderCounts(suffix, narrow_ids(first), k_counts))
            del first, suffix
            below = k_keys
        return tables


def narrow_ids(ids: I64) -> I64:
    """``ids`` as 32-bit integers when they fit (the same values)."""
    if len(ids) < (1 << 31) and (not len(ids) or int(ids.max()) < (1 << 31)):
        return ids.astype(np.int32)
    return ids


def _be32(ids: npt.NDArray[np.integer[Any]]) -> npt.NDArray[np.uint8]:
    return ids.astype(">u4").view(np.uint8).reshape(len(ids), 4)
