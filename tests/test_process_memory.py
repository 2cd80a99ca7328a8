"""Freed memory kept for reuse, and returned inside ``freed_memory_returned`` (process.py)."""

from __future__ import annotations

import ctypes
import os
import subprocess
import sys

import pytest

from rescore.process import _MALLOC_ENV

# In a fresh process: keep freed memory, then free a 256 MiB array outside and inside the
# block; print the resident memory after each free
CHILD = """
import numpy as np
from rescore.process import freed_memory_returned, keep_freed_memory
def rss():
    with open("/proc/self/status") as fh:
        return next(int(l.split()[1]) << 10 for l in fh if l.startswith("VmRSS:"))
assert keep_freed_memory()
a = np.ones(32 << 20); del a
kept = rss()
with freed_memory_returned():
    b = np.ones(32 << 20); del b
    returned = rss()
c = np.ones(32 << 20); del c
print(kept, returned, rss())
"""


def test_freed_memory_returned_inside_the_block_only() -> None:
    libc = ctypes.CDLL(None)
    if not sys.platform.startswith("linux") or not hasattr(libc, "gnu_get_libc_version"):
        pytest.skip("not glibc")
    env = {k: v for k, v in os.environ.items() if k not in _MALLOC_ENV}
    out = subprocess.run([sys.executable, "-c", CHILD], capture_output=True, text=True,
                         check=True, env=env).stdout
    kept, returned, after = (int(x) for x in out.split())
    # mallopt(3), from memory: with M_MMAP_MAX 0 every block comes from the heap, whose
    # free top is kept up to M_TRIM_THRESHOLD (1 GiB here); with mmap allowed again, a
    # block above M_MMAP_THRESHOLD (at most 32 MiB) is its own mapping, unmapped on free
    assert kept - returned > 200 << 20
    assert after - returned > 200 << 20  # the heap keeps freed memory again after the block
