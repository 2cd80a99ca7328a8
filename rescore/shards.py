"""Cutting an uncompressed file into line-aligned byte ranges for parallel workers."""

from __future__ import annotations

import os
from pathlib import Path

from rescore.compression import is_gzip_file
from rescore.spool import local


def count_lines(path: str | Path) -> int | None:
    """Newlines in an uncompressed file (one fast sequential read); None for gzip or when
    the file cannot be read (the reader then reports why)."""
    count = 0
    try:
        if is_gzip_file(path):
            return None
        with open(local(path), "rb") as fh:
            for block in iter(lambda: fh.read(1 << 22), b""):
                count += block.count(b"\n")
    except OSError:
        return None
    return count



def line_shards(path: str | Path, parts: int, min_bytes: int = 1 << 20
                ) -> list[tuple[int, int, int]]:
    """Split an uncompressed file into ``(start, end, first_line)`` byte ranges at line starts.

    At most ``parts`` shards, each of at least ``min_bytes`` (but the last), found by
    counting newlines in blocks, so it costs one sequential read.
    """
    path = local(path)
    size = os.path.getsize(path)
    target = max(min_bytes, -(-size // max(parts, 1)))
    shards: list[tuple[int, int, int]] = []
    start, first_line, lines, pos = 0, 1, 0, 0
    with open(path, "rb") as fh:
        while True:
            block = fh.read(1 << 20)
            if not block:
                break
            base = pos
            pos += len(block)
            search_from = 0
            while pos - start >= target:
                cut = block.find(b"\n", max(search_from, start + target - 1 - base))
                if cut < 0:
                    break
                lines += block.count(b"\n", search_from, cut + 1)
                search_from = cut + 1
                shards.append((start, base + cut + 1, first_line))
                start, first_line = base + cut + 1, lines + 1
            lines += block.count(b"\n", search_from)
    if start < size or not shards:
        shards.append((start, size, first_line))
    return shards

