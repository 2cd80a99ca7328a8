"""Words of an ARPA block to vocabulary ids: hash tables of the words' bytes as integers.

A word of up to 8 bytes is one little-endian 64-bit integer (the bytes past its end are
0), a word of 9 to 16 bytes two; each size has its own linear-probing table, filled most
probable word first so that frequent words sit in their home slot and most look-ups take
one probe. Longer words are looked up in a dict. No word of the vocabulary holds a 0 byte,
so an empty slot (holding 0) never matches a token.
"""

from __future__ import annotations

import numpy as np
import numpy.typing as npt

I64 = npt.NDArray[np.int64]
I32 = npt.NDArray[np.int32]
U64 = npt.NDArray[np.uint64]

WORD_BYTES = 16  # words up to this length are matched as integers, longer ones by a dict
_LOW = np.array([(1 << (8 * i)) - 1 for i in range(8)] + [(1 << 64) - 1], dtype=np.uint64)
_MIX1 = np.uint64(0x9E3779B97F4A7C15)
_MIX2 = np.uint64(0xC2B2AE3D27D4EB4F)


def slots_in_order(home: I64, bits: int) -> I32:
    """A linear-probing table of ``2**bits`` slots (slot -> key position, or -1) for keys
    given by their home slots, earlier keys first: keys go in by groups of growing size,
    and where several reach a free slot in the same round the earliest takes it, so the
    first keys sit in (or near) their home slot."""
    slots = np.full(1 << bits, -1, dtype=np.int32)
    mask = (1 << bits) - 1
    lo, size = 0, 256
    while lo < len(home):
        pending = np.arange(lo, min(lo + size, len(home)), dtype=np.int64)
        where = home[pending]
        while pending.size:
            free = np.flatnonzero(slots[where] < 0)
            _, first = np.unique(where[free], return_index=True)
            won = free[first]
            slots[where[won]] = pending[won]
            left = np.ones(len(pending), dtype=bool)
            left[won] = False
            pending = pending[left]
            where = (where[left] + 1) & mask
        lo += size
        size *= 4
    return slots


class _Table:
    """Words (as one or two integers each) to ids, by linear probing."""

    def __init__(self, x0: U64, x1: U64 | None, ids: I64) -> None:
        # at most a quarter full: nearly every look-up ends at its home slot
        self.bits = max(4, (4 * len(ids) - 1).bit_length())
        self.two = x1 is not None
        slots = slots_in_order(self.home(x0, x1), self.bits)
        filled = np.flatnonzero(slots >= 0)
        self.ids = np.full(len(slots), -1, dtype=np.int32)
        self.ids[filled] = ids[slots[filled]]
        self.held0 = np.zeros(len(slots), dtype=np.uint64)
        self.held0[filled] = x0[slots[filled]]
        self.held1 = None
        if x1 is not None:
            self.held1 = np.zeros(len(slots), dtype=np.uint64)
            self.held1[filled] = x1[slots[filled]]

    def home(self, x0: U64, x1: U64 | None) -> I64:
        """Each word's home slot: the top bits of a multiplicative hash of its integers."""
        with np.errstate(over="ignore"):
            z = x0 * _MIX1
            if x1 is not None:
                z += x1 * _MIX2
        z >>= np.uint64(64 - self.bits)
        return z.view(np.int64)

    def find(self, x0: U64, x1: U64 | None) -> I32:
        """The id of each word, or -1."""
        where = self.home(x0, x1)
        found = self.ids.take(where)
        miss = self.held0.take(where) != x0
        if self.held1 is not None and x1 is not None:
            miss |= self.held1.take(where) != x1
        if not miss.any():
            return found
        pending = np.flatnonzero(miss)
        found[pending] = -1
        where = where[pending]
        live = self.ids[where] >= 0  # an empty slot: not a word of the file
        pending, where = pending[live], where[live]
        mask = len(self.ids) - 1
        while pending.size:
            where = (where + 1) & mask
            at = self.ids[where]
            hit = self.held0[where] == x0[pending]
            if self.held1 is not None and x1 is not None:
                hit &= self.held1[where] == x1[pending]
            found[pending[hit]] = at[hit]
            more = ~hit & (at >= 0)
            pending, where = pending[more], where[more]
        return found


class WordIds:
    """The vocabulary's words to their ids, for tokens given by their bounds in a buffer."""

    def __init__(self, encoded: list[bytes], by_use: I64) -> None:
        """``encoded``: each id's word (no 0 byte); ``by_use``: the ids, most used first."""
        lengths = np.array([len(w) for w in encoded], dtype=np.int64)[by_use]
        joined = b"".join(encoded[i].ljust(WORD_BYTES, b"\0")[:WORD_BYTES]
                          for i in by_use.tolist())
        pairs = np.frombuffer(joined, dtype="<u8").reshape(-1, 2)
        short = lengths <= 8
        mid = (lengths > 8) & (lengths <= WORD_BYTES)
        self.short = _Table(np.ascontiguousarray(pairs[short, 0]), None, by_use[short])
        self.mid = _Table(np.ascontiguousarray(pairs[mid, 0]),
                          np.ascontiguousarray(pairs[mid, 1]), by_use[mid])
        self.long = {w: i for i, w in enumerate(encoded) if len(w) > WORD_BYTES}

    def find(self, words: U64, raw: bytearray, start: I64, end: I64) -> I32:
        """The id of each token ``raw[start:end]`` (-1 for a word not in the vocabulary, or
        an empty token), ``words[i]`` being the little-endian 64-bit word at byte ``i`` of
        ``raw``."""
        length = end - start
        if not len(length) or int(length.min()) < 1:
            return np.full(len(length), -1, dtype=np.int32)
        x0 = words[start]
        if int(length.max()) <= 8:
            x0 &= _LOW[length]
            return self.short.find(x0, None)
        x0 &= _LOW[np.minimum(length, 8)]
        found = self.short.find(x0, None)  # the longer tokens' results are replaced
        at = np.flatnonzero(length > 8)
        mid = at[length[at] <= WORD_BYTES]
        if len(mid):
            x1 = words[start[mid] + 8]
            x1 &= _LOW[length[mid] - 8]
            found[mid] = self.mid.find(x0[mid], x1)
        long = at[length[at] > WORD_BYTES]
        if len(long):
            found[long] = [self.long.get(bytes(raw[a:b]), -1)
                           for a, b in zip(start[long].tolist(), end[long].tolist(),
                                           strict=True)]
        return found
