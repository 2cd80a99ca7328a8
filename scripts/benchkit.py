"""What every benchmark shares: the process settings of the command line, said aloud, and
the timing of a call (the median of several runs)."""

from __future__ import annotations

import statistics
import time
from collections.abc import Callable
from typing import Any

from rescore.process import avoid_huge_pages, keep_freed_memory


def like_the_command_line() -> None:
    """Apply the command line's process settings here too, and print what they are."""
    changed = avoid_huge_pages()
    print("numpy huge-page advice: " + ("off, as in the command line" if changed
                                        else "as set by NUMPY_MADVISE_HUGEPAGE or numpy"))
    kept = keep_freed_memory()
    print("freed memory: " + ("kept for reuse, as in the command line" if kept
                              else "glibc's default or the user's MALLOC_* settings"))


def median_time(fn: Callable[[], Any], repeats: int) -> tuple[float, Any]:
    """Median wall time of ``repeats`` calls of ``fn``, in seconds, and its last result."""
    times, out = [], None
    for _ in range(repeats):
        start = time.perf_counter()
        out = fn()
        times.append(time.perf_counter() - start)
    return statistics.median(times), out


def median_seconds(fn: Callable[[], object], repeats: int) -> float:
    """Median wall time of ``repeats`` calls of ``fn``, in seconds."""
    return median_time(fn, repeats)[0]
