"""A vectorised open-addressing hash index from unique uint64 keys to their positions.

Linear probing over a power-of-two table at most 70% full; both building and looking up
run as numpy operations over whole batches, one probe step per loop round, so the Python
loop runs as many times as the longest probe sequence (a few dozen at most), never once
per key.
"""

from __future__ import annotations

from typing import Any

import numpy as np
import numpy.typing as npt

U64 = npt.NDArray[np.uint64]
I64 = npt.NDArray[np.int64]
I32 = npt.NDArray[np.int32]

# Fibonacci hashing: multiply by 2**64 / golden ratio, keep the high bits.
_GOLDEN = np.uint64(0x9E3779B97F4A7C15)
EMPTY = -1


MAX_LOAD = 0.7  # linear probing stays short well below full


def table_bits(n_keys: int) -> int:
    """Bits of the smallest table that holds ``n_keys`` at a load factor of at most 0.7."""
    return max(4, int(np.ceil(max(n_keys, 1) / MAX_LOAD) - 1).bit_length())


def home(keys: U64, bits: int) -> I64:
    """The slot where probing for each key starts in a table of ``2**bits`` slots."""
    with np.errstate(over="ignore"):
        mixed = keys * _GOLDEN
    return (mixed >> np.uint64(64 - bits)).astype(np.int64)


BATCH = 1 << 20  # keys inserted, or queries looked up, at a time: temporaries stay small


def build_slots(keys: U64) -> I32:
    """The slot array for ``keys`` (which must be unique): slot -> key position, or -1.

    Keys go in a batch at a time (the batch's temporaries, not every key's, are held);
    which slot a key takes depends on the batches, but every look-up finds the same
    position whatever the layout."""
    bits = table_bits(len(keys))
    mask = (1 << bits) - 1
    slots = np.full(1 << bits, EMPTY, dtype=np.int32)
    for lo in range(0, len(keys), BATCH):
        pending = np.arange(lo, min(lo + BATCH, len(keys)), dtype=np.int64)
        where = home(keys[lo:lo + BATCH], bits)
        while pending.size:
            free = slots[where] == EMPTY
            cand = pending[free]
            cand_slot = where[free]
            slots[cand_slot] = cand  # among keys racing for one slot, one write wins
            won = slots[cand_slot] == cand
            lost = np.concatenate([pending[~free], cand[~won]])
            lost_slot = np.concatenate([where[~free], cand_slot[~won]])
            pending = lost
            where = (lost_slot + 1) & mask
    return slots


def lookup(slots: I32, keys: U64, queries: U64) -> I64:
    """Position of each query in ``keys``, or -1 where absent (a batch at a time)."""
    if len(queries) <= BATCH:
        return _lookup(slots, keys, queries)
    result = np.empty(len(queries), dtype=np.int64)
    for lo in range(0, len(queries), BATCH):
        result[lo:lo + BATCH] = _lookup(slots, keys, queries[lo:lo + BATCH])
    return result


def _lookup(slots: I32, keys: U64, queries: U64) -> I64:
    bits = len(slots).bit_length() - 1
    mask = len(slots) - 1
    result = np.full(len(queries), -1, dtype=np.int64)
    active = np.arange(len(queries), dtype=np.int64)
    where = home(queries, bits)
    q = queries
    while active.size:
        at = slots[where].astype(np.int64)
        empty = at < 0
        hit = np.zeros(len(at), dtype=bool)
        filled = ~empty
        hit[filled] = keys[at[filled]] == q[filled]
        result[active[hit]] = at[hit]
        more = filled & ~hit
        active = active[more]
        q = q[more]
        where = (where[more] + 1) & mask
    return result


NO_KEY = np.uint64(0xFFFFFFFFFFFFFFFF)  # the key of an empty slot in a slot-ordered key array


def slot_keys(slots: I32, keys: U64) -> U64:
    """The key held in each slot (``NO_KEY`` where empty): one probe reads one array."""
    out = np.full(len(slots), NO_KEY, dtype=np.uint64)
    filled = np.flatnonzero(slots >= 0)
    out[filled] = keys[slots[filled]]
    return out


def lookup_slotted(slots: I32, held: U64, queries: U64) -> I64:
    """As :func:`lookup`, given ``held = slot_keys(slots, keys)`` (keys never equal NO_KEY).

    The first probe runs over the whole batch; later probes only over the queries that met
    another key in their slot.
    """
    return lookup_values(held, slots, queries, EMPTY).astype(np.int64, copy=False)


def lookup_values(held: U64, values: I32, queries: U64, missing: int) -> I32:
    """``values[slot]`` of each query's slot, or ``missing`` where absent, given ``held =
    slot_keys(slots, keys)`` and ``values`` one per slot: as :func:`lookup_slotted`, one
    gather fewer (the value is read from the slot it was found in)."""
    bits = len(held).bit_length() - 1
    mask = len(held) - 1
    where = home(queries, bits)
    got = held[where]
    out = values[where]
    miss = got != queries
    if not miss.any():
        return out
    out[miss] = missing
    pending = np.flatnonzero(miss & (got != NO_KEY))
    q = queries[pending]
    where = where[pending]
    while pending.size:
        where = (where + 1) & mask
        got = held[where]
        hit = got == q
        if hit.any():
            out[pending[hit]] = values[where[hit]]
        more = ~hit & (got != NO_KEY)
        pending, q, where = pending[more], q[more], where[more]
    return out


# --- the compact index of the native file (format 3) --------------------------------------

def _multiplier(bits: int) -> int:
    """An odd multiplier below ``2**bits``: multiplying by it modulo ``2**bits`` permutes
    ``[0, 2**bits)`` (an odd number is invertible modulo a power of two)."""
    return (int(_GOLDEN) & ((1 << bits) - 1)) | 1


def bucket_bits(n_keys: int) -> int:
    """Buckets for ``n_keys``: the largest power of two at most ``n_keys / 2`` (2 to 4 keys
    per bucket on average), at least 1."""
    return max(0, max(n_keys, 1).bit_length() - 2)


def _sorted_starts(buckets: U64, b: int, count_type: type[np.unsignedinteger[Any]],
                   step: int) -> npt.NDArray[Any]:
    """The first position of each of ``2**b`` buckets (and the end) in ``buckets``, which
    is sorted: the keys of each bucket counted a slice at a time (a slice's buckets are a
    short run of numbers, so its counts are short too), then added up in place."""
    starts = np.zeros((1 << b) + 1, dtype=count_type)
    for at in range(0, len(buckets), step):
        part = buckets[at:at + step]
        first = int(part[0])
        counts = np.bincount((part - np.uint64(first)).view(np.int64))
        starts[first + 1:first + 1 + len(counts)] += counts.astype(count_type)
    np.cumsum(starts, dtype=count_type, out=starts)
    return starts


WINDOW = 8  # rests read at once from a bucket's start (most buckets hold 1 to 5)
# _BYTES[i]: the low i bytes set to 1 (the first i rests of a window, one byte each)
_BYTES = np.array([((1 << (8 * i)) - 1) & 0x0101010101010101 for i in range(WINDOW + 1)],
                  dtype=np.uint64)
_BYTE_SUM = np.uint64(0x0101010101010101)  # times it, the top byte is the sum of all bytes
_LE32 = np.dtype("<u4")


class BucketIndex:
    """Unique keys below ``2**bits``, held as their hashes in sorted order.

    The hash ``h = key * A mod 2**bits`` (``A`` odd) is a permutation of the key space, so it
    loses nothing and can be undone. Sorted by ``h``, the keys fall into ``2**b`` buckets by
    their top ``b`` bits; ``starts[j]`` is the position of bucket ``j``'s first key and
    ``rest`` holds only the low ``bits - b`` bits of each hash (4 bytes when that is 32 or
    fewer bits), so a key costs its share of ``starts`` (1 to 2 bytes) plus ``rest``, and
    the position of a key in this order is the n-gram's id. Looking up reads the bucket's
    bounds and compares the few ``rest`` values in it, one batched round per position.
    """

    __slots__ = ("_mask", "_mult", "bits", "duplicates", "rest", "shift", "starts")

    def __init__(self, bits: int, shift: int, starts: npt.NDArray[Any],
                 rest: npt.NDArray[Any]) -> None:
        self.bits, self.shift, self.starts, self.rest = bits, shift, starts, rest
        self.duplicates = False  # set by build: some key was given more than once
        self._mask = np.uint64((1 << bits) - 1) if bits < 64 else np.uint64(0xFFFFFFFFFFFFFFFF)
        self._mult = np.uint64(_multiplier(bits))

    @staticmethod
    def key_bits(key_space: int) -> int:
        """Bits of a key below ``key_space`` (at least 1)."""
        return max(1, (max(key_space, 1) - 1).bit_length())

    @classmethod
    def build(cls, keys: U64, key_space: int, *, overwrite: bool = False
              ) -> tuple[BucketIndex, npt.NDArray[Any]]:
        """The index of ``keys`` (each below ``key_space``) and the permutation that puts
        them (and anything stored beside them) in its order: ``keys[perm]`` (32-bit
        positions when they fit, else 64-bit). A key given
        twice sets ``duplicates``. ``overwrite`` lets the hashes replace ``keys`` in place
        (less memory; the caller gives the array up)."""
        bits = cls.key_bits(key_space)
        b = min(bucket_bits(len(keys)), bits)
        shift = bits - b
        mask = np.uint64((1 << bits) - 1) if bits < 64 else np.uint64(0xFFFFFFFFFFFFFFFF)
        with np.errstate(over="ignore"):
            if overwrite:
                h = keys
                h *= np.uint64(_multiplier(bits))
            else:
                h = keys * np.uint64(_multiplier(bits))
        h &= mask
        count_type = np.uint32 if len(keys) < (1 << 32) else np.uint64
        del keys
        rest_type = np.uint32 if shift <= 32 else np.uint64
        rest = np.empty(len(h), dtype=rest_type)
        low = np.uint64((1 << shift) - 1)
        step = 1 << 18  # temporaries of 2 MiB at most
        place_bits = max(1, (len(h) - 1).bit_length())
        if bits + place_bits <= 64:
            # each hash with its position in the low bits, sorted in place: the order of
            # the hashes (unique keys: the same as an argsort's) at a plain sort's speed
            h <<= np.uint64(place_bits)
            for at in range(0, len(h), step):
                h[at:at + step] |= np.arange(at, min(at + step, len(h)), dtype=np.uint64)
            h.sort()
            # the positions (4 bytes each when they fit), the hashes, their rests
            perm: npt.NDArray[Any] = np.empty(len(h), np.int32 if place_bits < 32 else np.int64)
            places = np.uint64((1 << place_bits) - 1)
            for at in range(0, len(h), step):
                part = h[at:at + step]
                perm[at:at + step] = part & places
                part >>= np.uint64(place_bits)  # the hash, in place
                rest[at:at + step] = part & low
            duplicates = False
            for at in range(0, len(h), step):
                part = h[max(at - 1, 0):at + step]
                duplicates = duplicates or bool(np.any(part[1:] == part[:-1]))
            h >>= np.uint64(shift)  # each key's bucket, in increasing order
            starts = _sorted_starts(h, b, count_type, step)
        else:
            perm = np.argsort(h)  # introsort: no buffer beside the result
            # the rests in sorted order, a slice at a time (no sorted copy of every hash)
            duplicates = False
            for at in range(0, len(h), step):
                part = h[perm[max(at - 1, 0):at + step]]
                duplicates = duplicates or bool(np.any(part[1:] == part[:-1]))
                part &= low
                rest[at:at + step] = part[1:] if at else part
            h >>= np.uint64(shift)  # now each key's bucket (the counts need no order)
            starts = np.zeros((1 << b) + 1, dtype=count_type)
            np.cumsum(np.bincount(h.view(np.int64), minlength=1 << b), out=starts[1:])
        del h
        index = cls(bits, shift, starts, rest)
        index.duplicates = duplicates
        return index, perm

    def __len__(self) -> int:
        return len(self.rest)

    def _hash(self, queries: U64) -> U64:
        with np.errstate(over="ignore"):
            h = queries * self._mult
        h &= self._mask
        return h

    def find(self, queries: U64) -> I64:
        """Position of each query among the keys, or -1 (queries must be below
        ``2**bits``; the key of a listed context and a word always is).

        The rests of a bucket are in increasing order, so a query's position is its
        bucket's start plus the number of the bucket's rests below its own. One read of
        ``WINDOW`` rests from the bucket's start (and one of the start and the next,
        together) counts them for all but the queries whose bucket is longer, which scan on
        from there (:meth:`_scan`).
        """
        rest, starts = self.rest, self.starts
        n = len(rest)
        if n < WINDOW or starts.dtype != _LE32 or not (rest.flags.c_contiguous
                                                       and starts.flags.c_contiguous):
            return self._find_by_scan(queries)  # a tiny index, or one past 2**32 keys
        h = self._hash(queries)
        want = (h & np.uint64((1 << self.shift) - 1)).astype(rest.dtype)
        h >>= np.uint64(self.shift)
        # each bucket's start and the next one's, as one little-endian 64-bit word
        pairs = np.ndarray((len(starts) - 1,), dtype="<u8", buffer=starts, strides=(4,))
        pair = pairs.take(h.view(np.int64))
        del h
        at = (pair & np.uint64(0xFFFFFFFF)).view(np.int64)
        pair >>= np.uint64(32)
        end = pair.view(np.int64)
        # WINDOW rests from the bucket's start (from n - WINDOW for the last few buckets)
        first = np.minimum(at, n - WINDOW)
        windows = np.ndarray((n - WINDOW + 1,), dtype=f"V{WINDOW * rest.itemsize}",
                             buffer=rest, strides=(rest.itemsize,))
        below = (windows[first].view(rest.dtype).reshape(-1, WINDOW) < want[:, None])
        # one byte (0 or 1) per rest: those of the bucket kept, added up by a multiply
        count = below.view(np.uint64).reshape(-1)
        del below
        last = end - first
        np.minimum(last, WINDOW, out=last)
        count &= _BYTES[last]
        del last
        count >>= ((at - first) << 3).view(np.uint64)
        with np.errstate(over="ignore"):
            count *= _BYTE_SUM
        count >>= np.uint64(56)
        pos = count.view(np.int64)
        pos += at
        hit = rest.take(pos, mode="clip") == want  # pos may be one past the end
        hit &= pos < end
        result = np.where(hit, pos, EMPTY)
        first += WINDOW
        longer = np.flatnonzero((pos == first) & (end > first))
        if longer.size:
            self._scan(result, longer, first[longer], end[longer], want[longer])
        return result

    def _scan(self, result: I64, pending: I64, at: I64, end: I64,
              want: npt.NDArray[Any]) -> None:
        """Queries ``pending`` (their rests ``want``) looked for from ``at`` to ``end``, a
        position per round, stopping at the first rest not below theirs: found ones set in
        ``result``."""
        rest = self.rest
        while pending.size:
            got = rest.take(at)
            hit = got == want
            if hit.any():
                result[pending[hit]] = at[hit]
            at += 1
            more = (got < want) & (at < end)
            pending, at, end, want = pending[more], at[more], end[more], want[more]

    def _find_by_scan(self, queries: U64) -> I64:
        """As :meth:`find`, reading one rest per round from each bucket's start."""
        if not len(self.rest):
            return np.full(len(queries), EMPTY, dtype=np.int64)
        h = self._hash(queries)
        want = (h & np.uint64((1 << self.shift) - 1)).astype(self.rest.dtype)
        h >>= np.uint64(self.shift)
        bucket = h.view(np.int64)  # each query's bucket, in place
        # positions in the starts' own type (take accepts them; no widened copies)
        at = self.starts.take(bucket)
        bucket += 1
        end = self.starts.take(bucket)
        del h, bucket
        result = np.full(len(queries), EMPTY, dtype=np.int64)
        live = np.flatnonzero(at < end)  # an empty bucket holds no key
        self._scan(result, live, at[live].astype(np.int64), end[live].astype(np.int64),
                   want[live])
        return result

    def _counts(self) -> I64:
        s = self.starts.astype(np.int64)
        return s[1:] - s[:-1]

    def keys(self) -> U64:
        """Every key, in the index's order (derived: bucket number, rest, inverse hash)."""
        n_buckets = len(self.starts) - 1
        counts = self._counts()
        h = np.repeat(np.arange(n_buckets, dtype=np.uint64), counts) << np.uint64(self.shift)
        h |= self.rest.astype(np.uint64)
        inverse = np.uint64(pow(int(self._mult), -1, 1 << self.bits))
        with np.errstate(over="ignore"):
            h *= inverse
        h &= self._mask
        return h

    def check(self) -> str | None:
        """What is structurally wrong with the arrays (None when nothing): counts, order."""
        n = len(self.rest)
        s = self.starts
        if not 1 <= self.bits <= 64 or not 0 <= self.shift <= self.bits:
            return "key width"
        if len(s) != (1 << (self.bits - self.shift)) + 1 or int(s[0]) != 0 or int(s[-1]) != n:
            return "bucket starts"
        if n and (np.any(s[1:] < s[:-1])):
            return "bucket starts out of order"
        if self.shift < 64 and n and int(self.rest.max()) >> self.shift:
            return "hash rests too wide"
        return None

    def check_unique(self) -> bool:
        """Whether the hashes are strictly increasing (the keys unique); reads every key."""
        counts = self._counts()
        h = np.repeat(np.arange(len(self.starts) - 1, dtype=np.uint64),
                      counts) << np.uint64(self.shift)
        h |= self.rest.astype(np.uint64)
        return bool(np.all(h[1:] > h[:-1]))
