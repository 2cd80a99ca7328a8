"""Gzip handling for every reader: detection by magic bytes, and the cap on how far a gzip
input may unpack (a decompression bomb is refused, not read)."""

from __future__ import annotations

import gzip
import os
from pathlib import Path
from typing import IO, cast

from rescore.errors import InputError, UsageError, open_failure
from rescore.limits import (
    GZIP_FLOOR_BYTES,
    GZIP_RATIO_LIMIT,
    GZIP_RATIO_VARIABLE,
    describe_size,
)
from rescore.spool import local

GZIP_MAGIC = b"\x1f\x8b"


def is_gzip_name(path: str | Path) -> bool:
    return str(path).endswith(".gz")


def open_binary(path: str | Path) -> IO[bytes]:
    """Open a file for reading, decompressing gzip by its magic bytes (not just its name).

    ``-`` and other streams are read through their temporary copy (:mod:`rescore.spool`);
    errors name ``path`` as given.
    """
    p = local(path)
    try:
        fh: IO[bytes] = open(p, "rb")  # noqa: SIM115 - returned to the caller
    except (FileNotFoundError, IsADirectoryError, PermissionError) as exc:
        raise InputError(open_failure(exc), path=str(path)) from None
    head = fh.read(2)
    fh.seek(0)
    if head == GZIP_MAGIC:
        fh.close()
        return cast(IO[bytes], gzip.open(p, "rb"))
    return fh


def gzip_ratio_limit() -> int:
    """How many times its compressed size a gzip input may unpack to: :data:`GZIP_RATIO_LIMIT`,
    or the whole number in the environment variable ``RESCORE_GZIP_MAX_RATIO`` (inherited
    by worker processes); 0 lifts the cap."""
    text = os.environ.get(GZIP_RATIO_VARIABLE, "").strip()
    if not text:
        return GZIP_RATIO_LIMIT
    if not text.isdigit():
        raise UsageError(f"{GZIP_RATIO_VARIABLE}={text!r}: expected a whole number "
                         "(0 for no cap)")
    return int(text)


def gzip_unpacked_limit(fh: IO[bytes]) -> int | None:
    """The most bytes ``fh`` may unpack to: None for a plain file or with the cap lifted."""
    ratio = gzip_ratio_limit()
    if not isinstance(fh, gzip.GzipFile) or ratio == 0:
        return None
    return max(GZIP_FLOOR_BYTES, ratio * os.fstat(fh.fileno()).st_size)


def gzip_bomb_error(path: str | Path, limit: int, line: int | None) -> InputError:
    return InputError(f"gzip data unpacks to more than {describe_size(limit)}, over "
                      f"{gzip_ratio_limit()} times its compressed size (a decompression "
                      f"bomb?); set {GZIP_RATIO_VARIABLE} to allow more", path=path, line=line)


def is_gzip_file(path: str | Path) -> bool:
    with open(local(path), "rb") as fh:
        return fh.read(2) == GZIP_MAGIC

