"""The fitted model in back-off form and its vectorised look-ups.

Per order ``k >= 2``: the sorted keys ``suffix * V + first`` of its n-grams (see counts.py),
their natural-log probabilities, back-off weights (below the top order) and a hash slot
array. Unigrams are dense over the vocabulary. A probability is

    log P(w | h) = log P_L(longest listed n-gram ending in w) + sum of log bow(h_j), L <= j < m

where ``h_j`` is the last ``j`` words of the history and ``m`` the order in use at that
position; an unlisted context has weight 1. Every listed n-gram's suffix is listed too, so
the n-grams ending at a position are found by extending one word to the left at a time,
and the contexts of position ``i`` are the n-grams ending at ``i - 1``: ``N - 1`` hash
look-ups per token, each one batched over the whole input.
"""

from __future__ import annotations

from concurrent.futures import ThreadPoolExecutor
from dataclasses import dataclass, field
from typing import Any

import numpy as np
import numpy.typing as npt

from rescore.lm import hashindex
from rescore.lm.vocab import Vocabulary

F64 = npt.NDArray[np.float64]
I64 = npt.NDArray[np.int64]
I32 = npt.NDArray[np.int32]
U64 = npt.NDArray[np.uint64]


class Coded:
    """A table kept as small integer codes into a code book (see :mod:`rescore.lm.quantize`):
    indexed like the float64 array it stands for, it gives the book's values."""

    __slots__ = ("book", "codes")

    def __init__(self, codes: npt.NDArray[Any], book: F64) -> None:
        self.codes, self.book = codes, book

    def __getitem__(self, index: Any) -> F64:
        # clipped: a code past the book (a crafted file) reads its last entry, never memory
        # outside it
        out: F64 = self.book.take(self.codes[index], mode="clip")
        return out

    def __len__(self) -> int:
        return len(self.codes)

    def values(self) -> F64:
        out: F64 = self.book.take(self.codes, mode="clip")
        return out

    def as_table(self) -> F64:
        """This object typed as the float64 table it stands for (it is indexed the same)."""
        return self  # type: ignore[return-value]


@dataclass(frozen=True)
class BackoffTables:
    """``logp[k-1]``, ``bow[k-1]``, ``keys[k-1]``, ``slots[k-1]`` describe order ``k``."""

    vocab: Vocabulary
    logp: list[F64]
    bow: list[F64]  # orders 1 .. N-1
    keys: list[U64]  # keys[0] is empty: unigram ids are word ids
    slots: list[I32]
    # the compact form (as the native file stores it): per order k >= 2, ``index[k-1]``
    # holds the keys and the n-grams of that order are in its order; keys and slots are
    # then empty lists
    index: list[hashindex.BucketIndex | None] | None = None
    # per order, the key held in each hash slot; derived on first use, never stored
    _held: dict[int, U64] = field(default_factory=dict, init=False, repr=False, compare=False)
    # the compact form of these tables, made once (saving and the checksum both need it)
    _compact: list[BackoffTables] = field(default_factory=list, init=False, repr=False,
                                          compare=False)

    @property
    def order(self) -> int:
        return len(self.logp)

    @property
    def vsize(self) -> int:
        return len(self.vocab)

    def n_ngrams(self) -> list[int]:
        return [len(p) for p in self.logp]

    def find(self, k: int, queries: U64) -> I64:
        """Index among the order-``k`` n-grams of each key, or -1."""
        if self.index is not None:
            index = self.index[k - 1]
            assert index is not None
            return index.find(queries)
        return hashindex.lookup_slotted(self.slots[k - 1], self.held_keys(k), queries)

    def keys_of(self, k: int) -> U64:
        """The key of each order-``k`` n-gram, in id order (derived in the compact form)."""
        if self.index is not None:
            index = self.index[k - 1]
            assert index is not None
            return index.keys()
        return self.keys[k - 1]

    def key_space(self, k: int) -> int:
        """An upper bound of the order-``k`` keys: (order ``k - 1`` n-grams) x vocabulary."""
        return len(self.logp[k - 2]) * self.vsize

    def compact(self) -> BackoffTables:
        """These tables in the compact form of the native file (the same model: every
        look-up gives the same probability; only the n-gram ids of orders from 2 change)."""
        if self.index is not None:
            return self
        if not self._compact:
            self._compact.append(self._to_compact())
        return self._compact[0]

    def _to_compact(self) -> BackoffTables:
        v = np.uint64(self.vsize)
        logp, bow = [self.logp[0]], [self.bow[0]] if self.order > 1 else []
        index: list[hashindex.BucketIndex | None] = [None]
        new_id: I64 | None = None  # old id -> new id of the order below
        for k in range(2, self.order + 1):
            keys = self.keys[k - 1]
            if new_id is not None:
                keys = new_id[(keys // v).astype(np.int64)].astype(np.uint64) * v + keys % v
            idx, perm = hashindex.BucketIndex.build(keys, self.key_space(k))
            index.append(idx)
            logp.append(np.ascontiguousarray(self.logp[k - 1][perm]))
            if k < self.order:
                bow.append(np.ascontiguousarray(self.bow[k - 1][perm]))
                new_id = np.empty(len(perm), dtype=np.int64)
                new_id[perm] = np.arange(len(perm), dtype=np.int64)
        return BackoffTables(self.vocab, logp, bow, [], [], index)

    def held_keys(self, k: int) -> U64:
        """The key held in each hash slot of order ``k`` (derived once, or given by the
        model file)."""
        held = self._held.get(k)
        if held is None:
            self._hold_all()
            held = self._held[k]
        return held

    def give_held_keys(self, held: dict[int, U64]) -> None:
        """Slot-ordered keys read from a model file, so they need not be derived."""
        for k, arr in held.items():
            if len(arr) != len(self.slots[k - 1]):
                raise ValueError(f"order {k} held keys")
        self._held.update(held)

    def _hold_all(self) -> None:
        """Derive the slot-ordered keys of every order from 2, on two threads (numpy
        releases the GIL while filling them): a batch soon needs every order."""
        todo = [k for k in range(2, self.order + 1) if k not in self._held]
        with ThreadPoolExecutor(max_workers=2) as pool:
            held = pool.map(lambda k: hashindex.slot_keys(self.slots[k - 1], self.keys[k - 1]),
                            todo)
            self._held.update(zip(todo, held, strict=True))

    def key(self, ids: I64, first: I64 | npt.NDArray[np.int32]) -> U64:
        return ids.astype(np.uint64) * np.uint64(self.vsize) + first.astype(np.uint64)

    def suffix_first(self, k: int) -> tuple[I64, I64]:
        keys = self.keys_of(k)
        v = np.uint64(self.vsize)
        return (keys // v).astype(np.int64), (keys % v).astype(np.int64)

    def words_of(self, k: int) -> I64:
        """The n-grams of order ``k`` as a (count, k) matrix of word ids, first word first."""
        if k == 1:
            return np.arange(self.vsize, dtype=np.int64)[:, None]
        out = np.empty((len(self.logp[k - 1]), k), dtype=np.int64)
        at = np.arange(len(self.logp[k - 1]), dtype=np.int64)
        for j in range(k, 1, -1):
            suffix, first = self.suffix_first(j)
            out[:, k - j] = first[at]
            at = suffix[at]
        out[:, k - 1] = at
        return out

    def ids_of(self, ngrams: I64) -> I64:
        """The id of each row's n-gram among those of its order (-1 where not listed)."""
        width = ngrams.shape[1]
        ids = ngrams[:, -1].astype(np.int64) if width else np.zeros(0, np.int64)
        for k in range(2, width + 1):
            ids = self._extend(k, ids, ngrams[:, width - k])
        return ids

    # --- scoring -------------------------------------------------------------------------

    def _extend(self, k: int, below: I64, left: I64) -> I64:
        """Ids of the order-``k`` n-grams ``left + (n-gram below)``; -1 where either is absent."""
        ok = (below >= 0) & (left >= 0)
        out = np.full(len(below), -1, dtype=np.int64)
        at = np.flatnonzero(ok)
        if at.size:
            out[at] = self.find(k, self.key(below[at], left[at]))
        return out

    def _combine(self, grams: list[I64], contexts: list[I64], m: I64) -> F64:
        """Back-off sum given n-gram ids ending at w and at the end of the history."""
        longest = np.ones(len(m), dtype=np.int64)
        for k in range(2, len(grams) + 1):
            longest[grams[k - 1] >= 0] = k
        result = np.empty(len(m), dtype=np.float64)
        for k in range(1, len(grams) + 1):
            at = np.flatnonzero(longest == k)
            result[at] = self.logp[k - 1][grams[k - 1][at]]
        for j in range(1, len(contexts) + 1):
            ctx = contexts[j - 1]
            at = np.flatnonzero((longest <= j) & (j < m) & (ctx >= 0))
            result[at] += self.bow[j - 1][ctx[at]]
        return result

    def score_stream(self, tokens: I32, floor: I64) -> F64:
        """Natural-log probability of each position given its history back to ``floor``."""
        n = len(tokens)
        order = self.order
        v = np.uint64(self.vsize)
        reach = np.arange(n, dtype=np.int64)
        reach -= floor  # words of history within the sentence
        result = self.logp[0][tokens]
        if order == 1:
            return result
        longest = np.ones(n, dtype=np.int8)
        # listed[k-2]: positions whose order-k n-gram is listed, and that n-gram's id
        listed: list[tuple[I64, I64]] = []
        at = np.flatnonzero(reach >= 1)
        ids: I64 = tokens[at].astype(np.int64)  # order 2: the word is the suffix's id
        for k in range(2, order + 1):
            if k > 2:
                room = reach[at] >= k - 1
                at, ids = at[room], ids[room]
            key = ids.astype(np.uint64)
            key *= v
            key += tokens[at - (k - 1)].astype(np.uint64)
            found = self.find(k, key)
            ok = found >= 0
            at, ids = at[ok], found[ok]
            listed.append((at, ids))
            result[at] = self.logp[k - 1][ids]
            longest[at] = k
        # back-off weights of the contexts longer than the n-gram found, up to the order used;
        # the one-word contexts are every previous word: slices, no index arrays
        use = (longest[1:] <= 1) & (reach[1:] >= 1)
        tail = result[1:]
        tail[use] += self.bow[0][tokens[:-1][use]]
        for j in range(2, order):
            at, ids = listed[j - 2]
            nxt = at + 1  # the order-j n-gram ending at i-1 is the context of position i
            keep = nxt < n
            nxt, ids = nxt[keep], ids[keep]
            keep = (longest[nxt] <= j) & (reach[nxt] >= j)
            result[nxt[keep]] += self.bow[j - 1][ids[keep]]
        return result

    def score_ngrams(self, ngrams: I64) -> F64:
        """log P(last | the others) for each row; -1 on the left pads a shorter history."""
        width = ngrams.shape[1]
        order = min(self.order, width)
        ngrams = ngrams[:, width - order:]
        grams = [ngrams[:, -1].astype(np.int64)]
        for k in range(2, order + 1):
            grams.append(self._extend(k, grams[-1], ngrams[:, order - k]))
        contexts: list[I64] = []
        if order > 1:
            contexts.append(ngrams[:, order - 2].astype(np.int64))
            for j in range(2, order):
                contexts.append(self._extend(j, contexts[-1], ngrams[:, order - 1 - j]))
        valid = np.cumprod((ngrams >= 0)[:, ::-1], axis=1)
        m = valid.sum(axis=1).astype(np.int64)
        return self._combine(grams, contexts, m)
