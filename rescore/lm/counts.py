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
from concurrent.futures import ThreadPoolExecutor
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

    def pack(lo: int, hi: int) -> int:
        """Fill ``key[lo:hi]`` block by block; returns how many positions were dropped."""
        tmp = np.empty(_CHUNK, dtype=np.uint64)
        reach = np.empty(_CHUNK, dtype=np.int64)
        base = np.arange(_CHUNK, dtype=np.int64)
        dropped = 0
        for a in range(lo, hi, _CHUNK):
            b = min(a + _CHUNK, hi)
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
        return dropped

    # two halves on two threads (numpy releases the GIL in each block's operations)
    half = (n // 2) // _CHUNK * _CHUNK
    with ThreadPoolExecutor(max_workers=2) as pool:
        dropped = sum(pool.map(pack, (0, half), (half, n)))
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
    # runs of the top order start where neighbouring sorted keys differ; every lower order's
    # run starts at one of them, where the two keys differ in that order's lanes
    flag = np.empty(m, dtype=bool)
    flag[0] = True
    np.not_equal(key[1:], key[:-1], out=flag[1:])
    top = np.flatnonzero(flag)
    del flag
    top_key = key[top]
    del key
    top_diff = np.empty(len(top), dtype=np.uint64)
    top_diff[0] = np.uint64(0xFFFFFFFFFFFFFFFF)
    np.bitwise_xor(top_key[1:], top_key[:-1], out=top_diff[1:])
    runs = _Runs(top, top_key, top_diff, m, order, bits, filler, shifts)
    # the orders are independent given the runs; numpy releases the GIL in these whole-array
    # operations, so two threads keep both cores of a small machine busy
    with ThreadPoolExecutor(max_workers=2) as pool:
        levels = list(pool.map(runs.level, range(2, order + 1)))
        for table in pool.map(lambda k: runs.table(k, levels), range(2, order + 1)):
            tables.append(table)
            tick(1)
    return tables


@dataclass(frozen=True)
class _Level:
    """The runs of one order k among the top-order runs, before padded n-grams are dropped."""

    new: npt.NDArray[np.bool_] | None  # which top runs start a k-run (None: all, k = order)
    starts: I64  # where each k-run starts in the sorted keys
    keys: U64  # each k-run's key: the top k lanes
    first: I64  # each k-run's first word (the filler when the window began before <s>)
    kept: npt.NDArray[np.bool_]  # runs that are real n-grams (first word not the filler)


@dataclass(frozen=True)
class _Runs:
    top: I64
    top_key: U64
    top_diff: U64
    m: int
    order: int
    bits: int
    filler: np.uint64
    shifts: list[int]

    def level(self, k: int) -> _Level:
        if k == self.order:
            new, starts, keys = None, self.top, self.top_key
        else:
            new = self.top_diff >= np.uint64(1 << self.shifts[k - 1])
            starts, keys = self.top[new], self.top_key[new] >> np.uint64(self.shifts[k - 1])
        first = (keys & self.filler).view(np.int64)
        return _Level(new, starts, keys, first, first != np.int64(self.filler))

    def table(self, k: int, levels: list[_Level]) -> OrderCounts:
        lv = levels[k - 2]
        count = np.empty(len(lv.starts), dtype=np.int64)
        np.subtract(lv.starts[1:], lv.starts[:-1], out=count[:-1])
        count[-1] = self.m - lv.starts[-1]
        if k == 2:
            suffix = (lv.keys[lv.kept] >> np.uint64(self.bits)).view(np.int64)
        else:
            below = levels[k - 3]
            assert below.new is not None
            # the (k-1)-run each k-run lies in (counted from 1, in 32 bits while the keys are
            # fewer than 2**31), then that run's id among the listed (k-1)-grams
            inside = below.new if lv.new is None else below.new[lv.new]
            group = np.cumsum(inside, dtype=np.int32 if self.m < 2**31 else np.int64)
            rank = np.empty(len(below.kept) + 1, dtype=np.int64)
            rank[0] = -1
            np.cumsum(below.kept, out=rank[1:])
            rank -= 1
            suffix = rank[group[lv.kept]]
        return OrderCounts(suffix, lv.first[lv.kept], count[lv.kept])


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
