"""Raw arrays in a build's scratch folder, by name (see :mod:`rescore.lm.ondisk`).

Each array is a file of its little-endian bytes, written whole or a block at a time and
read back whole or a block at a time by explicit reads, so that nothing stays mapped and
reading a large array in blocks holds one block.
"""

from __future__ import annotations

from collections.abc import Callable, Iterator
from contextlib import contextmanager
from pathlib import Path
from typing import Any

import numpy as np
import numpy.typing as npt

from rescore.lm import store
from rescore.lm.external import _create, _write

BLOCK = 1 << 22  # entries of an order read from disk at a time (16 to 32 MiB of ids)


class Shelf:
    """Raw arrays in a scratch folder by name: written whole or a block at a time, read
    back whole or a block at a time (explicit reads, so nothing stays mapped)."""

    def __init__(self, folder: Path) -> None:
        self.folder = folder
        self._kind: dict[str, tuple[np.dtype[Any], int]] = {}

    def path(self, name: str) -> Path:
        return self.folder / f"{name}.raw"

    def __len__(self) -> int:
        return len(self._kind)

    def length(self, name: str) -> int:
        return self._kind[name][1]

    def put(self, name: str, array: npt.NDArray[Any]) -> None:
        with _create(self.path(name)) as fh:
            _write(fh, array)
        self._kind[name] = (array.dtype, len(array))

    @contextmanager
    def writer(self, name: str, dtype: Any) -> Iterator[Callable[[npt.NDArray[Any]], None]]:
        """A function that appends a block to the array ``name`` (of ``dtype``)."""
        kind = np.dtype(dtype)
        n = 0
        with _create(self.path(name)) as fh:
            def add(block: npt.NDArray[Any]) -> None:
                nonlocal n
                _write(fh, block.astype(kind, copy=False))
                n += len(block)
            yield add
        self._kind[name] = (kind, n)

    def adopt(self, name: str, path: Path, dtype: Any, length: int) -> None:
        """An array already written raw at ``path`` (moved into the shelf)."""
        path.rename(self.path(name))
        self._kind[name] = (np.dtype(dtype), length)

    def get(self, name: str) -> npt.NDArray[Any]:
        dtype, n = self._kind[name]
        return np.fromfile(self.path(name), dtype=dtype, count=n)

    def blocks(self, name: str, step: int | None = None) -> Iterator[npt.NDArray[Any]]:
        """The array ``name`` read ``step`` entries at a time (default :data:`BLOCK`)."""
        step = step or BLOCK
        dtype, n = self._kind[name]
        for lo in range(0, n, step):
            yield np.fromfile(self.path(name), dtype=dtype, count=min(step, n - lo),
                              offset=lo * dtype.itemsize)

    def mapped(self, name: str) -> npt.NDArray[Any]:
        """The array mapped read-only: its pages are read (and held) only where used."""
        dtype, n = self._kind[name]
        if not n:
            return np.zeros(0, dtype=dtype)
        return np.memmap(self.path(name), dtype=dtype, mode="r", shape=(n,))

    def entry(self, name: str) -> store.OnDisk:
        dtype, n = self._kind[name]
        return store.OnDisk(self.path(name), dtype, n)

    def drop(self, *names: str) -> None:
        for name in names:
            if self._kind.pop(name, None) is not None:
                self.path(name).unlink()


def id_type(n: int) -> type[np.signedinteger[Any]]:
    """The integer type of ids below ``n`` (32 bits when they fit)."""
    return np.int32 if n < (1 << 31) else np.int64
