"""Counting every n-gram of orders 1..N over a whole padded corpus, as numpy operations.

An n-gram ``w1 .. wk`` is identified by the id of its suffix ``w2 .. wk`` among the
(k-1)-grams and its first word ``w1``; the id of a unigram is its word id. Each order is
a table sorted by ``suffix * V + first`` (reversed lexicographic order). Two exact paths
give identical tables: when ``N * bits(V)`` fits in 64 bits, every window is packed into
one uint64 (last word in the high bits), sorted once, and each lower order is read off the
sorted keys by a shift; otherwise each order is sorted on its own with an inverse map.
"""

from __future__ import annotations

from collections.abc import Callable
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
    tokens: I32, floor: I64, order: int, vocab_size: int, *, packed: bool | None = None,
    progress: Callable[[int], None] | None = None,
) -> list[OrderCounts]:
    """The n-gram tables of orders 1..``order`` (index 0 holds the unigrams, dense).

    ``progress`` is called with 1 as each order's table is complete.
    """
    tick = progress if progress is not None else _no_progress
    bits = max(int(vocab_size).bit_length(), 1)
    fits = order * bits <= 64
    if packed is None:
        packed = fits
    if packed and not fits:
        raise ValueError(f"{order} ids of {bits} bits do not fit in 64 bits")
    if packed:
        return _count_packed(tokens, floor, order, vocab_size, bits, tick)
    return _count_by_order(tokens, floor, order, vocab_size, tick)


def _no_progress(n: int) -> None:
    pass


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


_CHUNK = 1 << 16  # positions per block while packing windows: the temporaries stay in cache


def _window_keys(tokens: I32, floor: I64, order: int, bits: int) -> tuple[U64, int]:
    """Every window packed into one uint64 (last word in the high bits), and how many are valid.

    A lane that lies before the window's floor holds the filler (all ones); a position whose
    floor lies past it gets an all-ones key, which sorts after every real key.
    """
    n = len(tokens)
    pad = order - 1
    shifts = [bits * (order - 1 - j) for j in range(order)]  # lane j = the j-th word back
    filler = (1 << bits) - 1
    # fill[r + 1]: lanes beyond reach r hold the filler; r = -1 marks a position to drop
    fill = np.zeros(order + 1, dtype=np.uint64)
    fill[0] = np.uint64(0xFFFFFFFFFFFFFFFF)
    for r in range(order):
        fill[r + 1] = np.uint64(sum(filler << shifts[j] for j in range(r + 1, order)))
    padded = np.zeros(n + pad, dtype=np.int32)
    padded[pad:] = tokens
    key = np.empty(n, dtype=np.uint64)
    tmp = np.empty(_CHUNK, dtype=np.uint64)
    reach = np.empty(_CHUNK, dtype=np.int64)
    base = np.arange(_CHUNK, dtype=np.int64)
    dropped = 0
    for a in range(0, n, _CHUNK):
        b = min(a + _CHUNK, n)
        c = b - a
        seg, t = key[a:b], tmp[:c]
        seg[:] = padded[a + pad:b + pad]
        seg <<= np.uint64(shifts[0])
        for j in range(1, order):
            t[:] = padded[a + pad - j:b + pad - j]
            t <<= np.uint64(shifts[j])
            seg |= t
        rc = reach[:c]
        np.subtract(base[:c], floor[a:b] - a, out=rc)
        np.minimum(rc, order - 1, out=rc)
        np.maximum(rc, -1, out=rc)
        rc += 1
        seg |= fill[rc]
        dropped += int(np.count_nonzero(rc == 0))
    return key, n - dropped


def _count_packed(
    tokens: I32, floor: I64, order: int, vocab_size: int, bits: int,
    tick: Callable[[int], None],
) -> list[OrderCounts]:
    key, m = _window_keys(tokens, floor, order, bits)
    key.sort()
    key = key[:m]
    filler = np.uint64((1 << bits) - 1)
    shifts = [bits * (order - k) for k in range(1, order + 1)]  # order k keeps the top k lanes
    # unigrams: the top lane, counted by binary search over the sorted keys
    edges = np.searchsorted(key, np.arange(vocab_size + 1, dtype=np.uint64)
                            << np.uint64(shifts[0]))
    tables = [OrderCounts(np.zeros(vocab_size, np.int64), np.arange(vocab_size, dtype=np.int64),
                          np.diff(edges).astype(np.int64))]
    tick(1)
    if order == 1 or m == 0:
        empty = np.zeros(0, dtype=np.int64)
        tables += [OrderCounts(empty, empty, empty) for _ in range(order - 1)]
        return tables
    # the highest differing bit between neighbours tells which orders start a new run there
    diff = np.empty(m, dtype=np.uint64)
    diff[0] = np.uint64(0xFFFFFFFFFFFFFFFF)
    np.bitwise_xor(key[1:], key[:-1], out=diff[1:])
    top = np.flatnonzero(diff)  # runs of the top order; every lower run starts at one of them
    top_diff = diff[top]
    del diff
    top_key = key[top]
    del key
    prev_new: npt.NDArray[np.bool_] | None = None
    prev_rank: I64 | None = None
    new: npt.NDArray[np.bool_] | None
    at: I64 | None
    for k in range(2, order + 1):
        if k == order:
            new = at = None
            starts = top
            uk = top_key
        else:
            new = top_diff >= np.uint64(1 << shifts[k - 1])
            at = np.flatnonzero(new)
            starts = top[at]
            uk = top_key[at] >> np.uint64(shifts[k - 1])
        first = (uk & filler).view(np.int64)
        keep = np.flatnonzero(first != np.int64(filler))
        starts_kept = starts[keep]
        ends = np.empty(len(starts), dtype=np.int64)
        ends[:-1] = starts[1:]
        ends[-1] = m
        cnt = ends[keep]
        cnt -= starts_kept
        if k == 2:
            suffix = (uk[keep] >> np.uint64(bits)).view(np.int64)
        else:
            assert prev_new is not None and prev_rank is not None
            # the (k-1)-gram run each kept k-gram run lies in, then its id among the listed
            below = prev_new if at is None else prev_new[at]
            group = np.cumsum(below, dtype=np.int64)[keep]
            suffix = prev_rank[group]
        if new is not None:
            prev_new = new
            valid = np.zeros(len(starts) + 1, dtype=np.int64)
            valid[keep + 1] = 1
            prev_rank = np.cumsum(valid, out=valid)
            prev_rank -= 1  # prev_rank[g + 1]: id of run g among the listed (k-1)-grams
        tables.append(OrderCounts(suffix, first[keep], cnt))
        tick(1)
    return tables


def _count_by_order(tokens: I32, floor: I64, order: int, vocab_size: int,
                    tick: Callable[[int], None]) -> list[OrderCounts]:
    n = len(tokens)
    pos = np.arange(n, dtype=np.int64)
    ends = pos >= floor
    words = tokens[ends].astype(np.int64)
    unigram_counts = np.bincount(words, minlength=vocab_size).astype(np.int64)
    tables = [_unigrams(np.arange(vocab_size, dtype=np.int64), unigram_counts, vocab_size)]
    tick(1)
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
        tick(1)
    return tables
