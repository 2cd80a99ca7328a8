"""ARPA back-off text files (log10), read and written: the entry points.

The conventions are in :mod:`rescore.lm.arpa_text`; reading is done by the fast block
reader (:mod:`rescore.lm.arpa_fast`), which hands any file it does not expect to the exact
line reader (:mod:`rescore.lm.arpa_exact`); writing is :mod:`rescore.lm.arpa_write`.
"""

from __future__ import annotations

import shutil
import sys
import tempfile
from pathlib import Path
from typing import Any

from rescore.compression import open_binary
from rescore.errors import RescoreError
from rescore.lm.arpa_exact import read_exact
from rescore.lm.arpa_fast import Slow, read_fast
from rescore.lm.arpa_write import format_numbers, write, write_fast, write_lines
from rescore.lm.tables import BackoffTables

__all__ = ["format_numbers", "read", "read_exact", "write", "write_fast", "write_lines"]


def read(path: str | Path) -> tuple[BackoffTables, dict[str, Any]]:
    """Read an ARPA file (``-``: standard input) into compact back-off tables, fast.

    Files as this program writes them, and most written elsewhere, are parsed in blocks
    with numpy; any other file, and every malformed one, is read by :func:`read_exact`
    (slower, and naming the line of an error). Standard input is first copied to a
    temporary file, so that the exact reader can read it again when needed.
    """
    if str(path) == "-":
        return _read_stdin()
    try:
        with open_binary(path) as fh:
            return read_fast(fh)
    except Slow:
        pass
    tables, meta = read_exact(path)
    return tables.compact(), meta


def _read_stdin() -> tuple[BackoffTables, dict[str, Any]]:
    with tempfile.NamedTemporaryFile(prefix="rescore-stdin-", suffix=".arpa") as tmp:
        shutil.copyfileobj(sys.stdin.buffer, tmp, 1 << 20)
        tmp.flush()
        try:
            return read(tmp.name)
        except RescoreError as exc:
            if exc.path == tmp.name:
                exc.path = "-"
            raise
