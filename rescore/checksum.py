"""Checksums of files, as recorded in provenance and checked against weights files."""

from __future__ import annotations

import hashlib
from pathlib import Path

from rescore.spool import local


def sha256_file(path: str | Path) -> str:
    digest = hashlib.sha256()
    with open(local(path), "rb") as fh:
        for block in iter(lambda: fh.read(1 << 20), b""):
            digest.update(block)
    return digest.hexdigest()
