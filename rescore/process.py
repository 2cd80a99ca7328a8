"""Process-wide settings that the command line applies before any heavy numpy work."""

from __future__ import annotations

import contextlib
import ctypes
import os
import sys
from collections.abc import Iterator
from typing import Any

import numpy as np

HUGEPAGE_ENV = "NUMPY_MADVISE_HUGEPAGE"


def avoid_huge_pages() -> bool:
    """Stop numpy asking for transparent huge pages for large arrays, unless the user chose.

    numpy advises the kernel to back every array of 4 MiB or more with huge pages. Where the
    kernel then compacts memory to find them on each page fault (transparent huge pages with
    defrag on 'madvise', a common default), the many large temporaries of counting and
    scoring cost more to fault in than the huge pages save: counting the n-grams of a
    10-million-word corpus took up to twice as long on our 2-core test machine
    (scripts/bench_lm.py). A value of ``NUMPY_MADVISE_HUGEPAGE`` set by the user wins.
    The variable is also set for worker processes started afresh. Returns whether numpy's
    setting was changed in this process.
    """
    if HUGEPAGE_ENV in os.environ:
        return False
    os.environ[HUGEPAGE_ENV] = "0"
    core: Any = getattr(np, "_core", None)
    setter = getattr(getattr(core, "multiarray", None), "_set_madvise_hugepage", None)
    if setter is None:  # another numpy: it reads the variable when it is imported
        return False
    setter(False)
    return True


# glibc's mallopt parameters (malloc.h)
_M_TRIM_THRESHOLD = -1
_M_MMAP_MAX = -4
_GLIBC_MMAP_MAX = 65536  # glibc's default: large blocks get their own mapping
_kept: list[Any] = []  # the C library, once keep_freed_memory has applied its settings
_MALLOC_ENV = ("MALLOC_MMAP_MAX_", "MALLOC_TRIM_THRESHOLD_", "MALLOC_MMAP_THRESHOLD_",
               "GLIBC_TUNABLES")
KEEP_FREED_BYTES = 1 << 30


def keep_freed_memory() -> bool:
    """Let glibc reuse freed memory for the next large array instead of returning it.

    By default glibc gives every large block (above 32 MiB at most) its own mapping and
    returns it to the system when freed, so the next large temporary is faulted in page by
    page again. Counting, fitting and scoring make many such temporaries; serving them from
    the heap, and keeping up to 1 GiB of freed heap for reuse, made counting about a fifth
    faster on our 2-core test machine (scripts/bench_lm.py). The price: the process does
    not shrink until it exits, and the heap's fragments raise the peak a little (building
    the 4-gram model of a 10-million-word text: 3.4 GB instead of 3.1, same time).
    Skipped when any glibc malloc variable is set (the user's choice wins) or the C library
    is not glibc. Returns whether applied.
    """
    if not sys.platform.startswith("linux") or any(v in os.environ for v in _MALLOC_ENV):
        return False
    try:
        libc = ctypes.CDLL(None)
    except OSError:
        return False
    # gnu_get_libc_version exists only in glibc, whose mallopt parameters these are
    if not hasattr(libc, "gnu_get_libc_version") or not hasattr(libc, "mallopt"):
        return False
    applied = bool(libc.mallopt(_M_MMAP_MAX, 0)) and bool(
        libc.mallopt(_M_TRIM_THRESHOLD, KEEP_FREED_BYTES))
    if applied and not _kept:
        _kept.append(libc)
    return applied


@contextlib.contextmanager
def freed_memory_returned() -> Iterator[None]:
    """Inside the block, glibc's default again: each large block its own mapping, returned
    to the system when freed (where :func:`keep_freed_memory` was applied; else nothing
    changes). For steps whose peak matters more than their speed: the heap kept for reuse
    holds freed temporaries that no later array fits, and they count in the peak (the
    estimation of a 4-gram of 60 million words on disk: 2.54 GB instead of 3.18)."""
    if not _kept:
        yield
        return
    libc = _kept[0]
    libc.malloc_trim(0)
    libc.mallopt(_M_MMAP_MAX, _GLIBC_MMAP_MAX)
    try:
        yield
    finally:
        libc.mallopt(_M_MMAP_MAX, 0)


def give_back_freed_memory() -> bool:
    """Return the freed heap memory that :func:`keep_freed_memory` keeps to the system now
    (glibc's ``malloc_trim``), before a step whose peak matters more than its speed.
    Returns whether glibc did so; elsewhere nothing happens."""
    if not sys.platform.startswith("linux"):
        return False
    try:
        libc = ctypes.CDLL(None)
    except OSError:
        return False
    if not hasattr(libc, "gnu_get_libc_version") or not hasattr(libc, "malloc_trim"):
        return False
    return bool(libc.malloc_trim(0))
