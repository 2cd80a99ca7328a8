"""The pages of a mapped model file: read a piece at a time and given back.

A model file is memory-mapped (:mod:`rescore.lm.store`); every page read through the
mapping then counts in the process's memory until the mapping is closed. Reading a whole
file through it (to check its checksum, or to copy its arrays into another file) would
hold the whole file. These helpers read it a piece at a time and give each piece's pages
back to the kernel (``madvise(MADV_DONTNEED)``): they stay in its file cache, and a later
read maps them again without reading the disk.
"""

from __future__ import annotations

import contextlib
import mmap
from collections.abc import Iterator
from typing import Any

import numpy as np

RELEASE_BYTES = 16 << 20  # a mapped file's bytes read between two releases of its pages


def mapping_of(arr: np.ndarray[Any, Any]) -> tuple[mmap.mmap, int] | None:
    """The file mapping that ``arr`` views and the offset of its first byte in it, or
    None when it views none."""
    base: Any = arr
    while isinstance(base, np.ndarray):
        base = base.base
    if isinstance(base, memoryview):
        base = base.obj
    if not isinstance(base, mmap.mmap) or base.closed or not len(base):
        return None
    start = np.frombuffer(base, dtype=np.uint8, count=1).ctypes.data
    return base, arr.ctypes.data - start


def release(data: mmap.mmap, lo: int, hi: int) -> None:
    """Give the pages of bytes ``lo`` to ``hi`` of a read-only mapping back to the kernel:
    they stay in its file cache (a later read maps them again, without reading the disk),
    but no longer count in this process's memory."""
    start = lo - lo % mmap.PAGESIZE
    if hi > start and hasattr(mmap, "MADV_DONTNEED"):
        with contextlib.suppress(OSError, ValueError):  # advice only
            data.madvise(mmap.MADV_DONTNEED, start, hi - start)


def read_through(data: mmap.mmap, offset: int, view: memoryview) -> Iterator[memoryview]:
    """``view`` (bytes of ``data`` from ``offset``) in pieces, the pages of each given back
    once the consumer asks for the next: reading a whole mapped model (to check it, or to
    copy it into another file) holds a piece of it, not all of it."""
    for lo in range(0, len(view), RELEASE_BYTES):
        hi = min(lo + RELEASE_BYTES, len(view))
        yield view[lo:hi]
        release(data, offset + lo, offset + hi)


def array_bytes(arr: np.ndarray[Any, Any]) -> Iterator[memoryview]:
    """An array's bytes for writing; those of a mapped file a piece at a time."""
    flat = arr.reshape(-1).view(np.uint8)
    where = mapping_of(arr)
    if where is None:
        yield flat.data
    else:
        yield from read_through(where[0], where[1], flat.data)
