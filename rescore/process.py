"""Process-wide settings that the command line applies before any heavy numpy work."""

from __future__ import annotations

import os
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
