"""A vectorised open-addressing hash index from unique uint64 keys to their positions.

Linear probing over a power-of-two table at most 70% full; both building and looking up
run as numpy operations over whole batches, one probe step per loop round, so the Python
loop runs as many times as the longest probe sequence (a few dozen at most), never once
per key.
"""

from __future__ import annotations

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


def _home(keys: U64, bits: int) -> I64:
    with np.errstate(over="ignore"):
        mixed = keys * _GOLDEN
    return (mixed >> np.uint64(64 - bits)).astype(np.int64)


def build_slots(keys: U64) -> I32:
    """The slot array for ``keys`` (which must be unique): slot -> key position, or -1."""
    bits = table_bits(len(keys))
    mask = (1 << bits) - 1
    slots = np.full(1 << bits, EMPTY, dtype=np.int32)
    pending = np.arange(len(keys), dtype=np.int64)
    where = _home(keys, bits)
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
    """Position of each query in ``keys``, or -1 where absent."""
    bits = len(slots).bit_length() - 1
    mask = len(slots) - 1
    result = np.full(len(queries), -1, dtype=np.int64)
    active = np.arange(len(queries), dtype=np.int64)
    where = _home(queries, bits)
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
    bits = len(slots).bit_length() - 1
    mask = len(slots) - 1
    where = _home(queries, bits)
    got = held[where]
    hit = got == queries
    result = np.where(hit, slots[where], EMPTY).astype(np.int64)
    pending = np.flatnonzero(~hit & (got != NO_KEY))
    if pending.size:
        q = queries[pending]
        where = where[pending]
        while pending.size:
            where = (where + 1) & mask
            got = held[where]
            hit = got == q
            if hit.any():
                result[pending[hit]] = slots[where[hit]]
            more = ~hit & (got != NO_KEY)
            pending, q, where = pending[more], q[more], where[more]
    return result


def lookup_values(held: U64, values: I32, queries: U64, missing: int) -> I32:
    """``values[slot]`` of each query's slot, or ``missing`` where absent, given ``held =
    slot_keys(slots, keys)`` and ``values`` one per slot: as :func:`lookup_slotted`, one
    gather fewer (the value is read from the slot it was found in)."""
    bits = len(held).bit_length() - 1
    mask = len(held) - 1
    where = _home(queries, bits)
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
