"""Counting every n-gram of orders 1..N over a whole padded corpus, as numpy operations.

An n-gram ``w1 .. wk`` is identified by the id of its suffix ``w2 .. wk`` among the
(k-1)-grams and its first word ``w1``; the id of a unigram is its word id. Each order is
a table sorted by ``suffix * V + first`` (reversed lexicographic order). Two exact paths
give identical tables: when ``N * bits(V)`` fits in 64 bits, every window is packed into
one uint64 (last word in the high bits), sorted once, and each lower order is read off the
sorted keys by a shift; otherwise each order is sorted on its own with an inverse map.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
import numpy.typing as npt

from rescore.lm.vocab import UNK_ID, Stream

I64 = npt.NDArray[np.int64]
I32 = npt.NDArray[np.int32]
U64 = npt.NDArray[np.uint64]


@dataclass(frozen=True)
class OrderCounts:
    """The distinct n-grams of one order, sorted by ``suffix * V + first``."""

    suffix: I64
    first: I64
    count: I64

    def __len__(self) -> int:
        return len(self.first)


def window_floor(stream: Stream, closed_vocab: bool) -> I64:
    """Per position, the earliest position a window ending there may start at.

    The sentence's ``<s>``; with a closed vocabulary also just after the last ``<unk>``, so
    no counted n-gram contains an out-of-vocabulary word.
    """
    floor = stream.starts[stream.sentence_of]
    if closed_vocab:
        floor = floor.copy()
        unk = np.flatnonzero(stream.tokens == UNK_ID)
        floor[unk] = unk + 1
        floor = np.maximum.accumulate(floor) if len(floor) else floor
    return floor


def count_ngrams(
    tokens: I32, floor: I64, order: int, vocab_size: int, *, packed: bool | None = None
) -> list[OrderCounts]:
    """The n-gram tables of orders 1..``order`` (index 0 holds the unigrams, dense)."""
    bits = max(int(vocab_size).bit_length(), 1)
    fits = order * bits <= 64
    if packed is None:
        packed = fits
    if packed and not fits:
        raise ValueError(f"{order} ids of {bits} bits do not fit in 64 bits")
    if packed:
        return _count_packed(tokens, floor, order, vocab_size, bits)
    return _count_by_order(tokens, floor, order, vocab_size)


def _run_lengths(sorted_keys: U64) -> tuple[U64, I64]:
    if not len(sorted_keys):
        return sorted_keys, np.zeros(0, dtype=np.int64)
    flag = np.empty(len(sorted_keys), dtype=bool)
    flag[0] = True
    np.not_equal(sorted_keys[1:], sorted_keys[:-1], out=flag[1:])
    starts = np.flatnonzero(flag)
    counts = np.empty(len(starts), dtype=np.int64)
    np.subtract(starts[1:], starts[:-1], out=counts[:-1])
    counts[-1] = len(sorted_keys) - starts[-1]
    return sorted_keys[starts], counts


def _unigrams(words: I64, counts: I64, vocab_size: int) -> OrderCounts:
    dense = np.zeros(vocab_size, dtype=np.int64)
    dense[words] = counts
    return OrderCounts(np.zeros(vocab_size, np.int64), np.arange(vocab_size, dtype=np.int64), dense)


def _count_packed(
    tokens: I32, floor: I64, order: int, vocab_size: int, bits: int
) -> list[OrderCounts]:
    n = len(tokens)
    filler = np.uint64((1 << bits) - 1)
    pos = np.arange(n, dtype=np.int64)
    key = tokens.astype(np.uint64) << np.uint64(bits * (order - 1))
    tok64 = key >> np.uint64(bits * (order - 1))
    # positions whose window reaches back past its floor, and by how far it may reach
    reach = pos - floor
    short = np.flatnonzero(reach < order - 1)
    short_reach = reach[short]
    for j in range(1, order):
        shift = np.uint64(bits * (order - 1 - j))
        if j < n:
            key[j:] |= tok64[: n - j] << shift
        # within j of the floor the j-th word back is outside the window: the filler
        bad = short[short_reach < j]
        lane = filler << shift
        key[bad] = (key[bad] & ~lane) | lane
    if np.any(reach < 0):
        key = key[reach >= 0]
    key.sort()
    tables: list[OrderCounts] = []
    previous: U64 | None = None
    for k in range(1, order + 1):
        kk = key >> np.uint64(bits * (order - k))
        if k > 1:
            kk = kk[(kk & filler) != filler]
        uniq, cnt = _run_lengths(kk)
        del kk
        if k == 1:
            tables.append(_unigrams(uniq.astype(np.int64), cnt, vocab_size))
        else:
            upper = uniq >> np.uint64(bits)
            if k == 2:
                suffix = upper.astype(np.int64)
            else:
                assert previous is not None
                suffix = np.searchsorted(previous, upper).astype(np.int64)
            tables.append(OrderCounts(suffix, (uniq & filler).astype(np.int64), cnt))
        previous = uniq
    return tables


def _count_by_order(tokens: I32, floor: I64, order: int, vocab_size: int) -> list[OrderCounts]:
    n = len(tokens)
    pos = np.arange(n, dtype=np.int64)
    ends = pos >= floor
    words = tokens[ends].astype(np.int64)
    unigram_counts = np.bincount(words, minlength=vocab_size).astype(np.int64)
    tables = [_unigrams(np.arange(vocab_size, dtype=np.int64), unigram_counts, vocab_size)]
    ids = tokens.astype(np.int64)  # id of the n-gram of the current order ending at each position
    v = np.uint64(vocab_size)
    for k in range(2, order + 1):
        at = np.flatnonzero(pos - (k - 1) >= floor)
        key = ids[at].astype(np.uint64) * v + tokens[at - (k - 1)].astype(np.uint64)
        perm = np.argsort(key)
        sk = key[perm]
        uniq, cnt = _run_lengths(sk)
        if k < order:
            flag = np.empty(len(sk), dtype=bool)
            if len(sk):
                flag[0] = True
                np.not_equal(sk[1:], sk[:-1], out=flag[1:])
            group = np.cumsum(flag) - 1
            ids = np.full(n, -1, dtype=np.int64)
            ids[at[perm]] = group
        tables.append(OrderCounts((uniq // v).astype(np.int64), (uniq % v).astype(np.int64), cnt))
    return tables
