"""Standard input and other streams as inputs: ``-``, pipes, ``/dev/stdin``, process
substitution.

The readers need a file they can open more than once: gzip is detected from the first
bytes and the file reopened, a reader that meets a problem reads again to name the line,
and the pool's workers each open the input at their own shard. A stream can be read only
once, so the first time a stream is opened its bytes are copied to a temporary file (one
copy per stream for the whole process, removed when the process ends), and every opener
reads the copy. Error messages keep naming the stream as the user gave it (``-``). A
process killed with SIGKILL leaves its copy, named ``rescore-stream-*``, in the system
temporary folder.
"""

from __future__ import annotations

import atexit
import contextlib
import os
import shutil
import stat
import sys
import tempfile
from pathlib import Path

from rescore.errors import InputError

STDIN = "-"
_PREFIX = "rescore-stream-"
_copies: dict[str, Path] = {}


def is_stream(path: str | Path) -> bool:
    """``-``, or a path that names a pipe, a character device or a socket (not a file)."""
    if str(path) == STDIN:
        return True
    try:
        mode = os.stat(path).st_mode
    except OSError:
        return False  # the opener reports a missing or unreadable path in its own words
    return not (stat.S_ISREG(mode) or stat.S_ISDIR(mode) or stat.S_ISBLK(mode))


def local(path: str | Path) -> Path:
    """A path the readers can open as often as they need: ``path`` itself for a file, a
    temporary copy of the bytes for a stream (made once per stream and process)."""
    key = str(path)
    if key in _copies:
        return _copies[key]
    if not is_stream(path):
        return Path(path)
    fd, name = tempfile.mkstemp(prefix=_PREFIX)
    copy = Path(name)
    owner = os.getpid()
    atexit.register(_remove, copy, owner)
    try:
        with os.fdopen(fd, "wb") as dst:
            if key == STDIN:
                shutil.copyfileobj(sys.stdin.buffer, dst, 1 << 20)
            else:
                with open(path, "rb") as src:
                    shutil.copyfileobj(src, dst, 1 << 20)
    except OSError as exc:
        _remove(copy, owner)
        reason = exc.strerror or type(exc).__name__
        raise InputError(f"could not copy the stream to a temporary file in "
                         f"{tempfile.gettempdir()} ({reason.lower()}); write it to a file "
                         "first", path=key) from None
    _copies[key] = copy
    return copy


def _remove(copy: Path, owner: int) -> None:
    # a forked worker inherits the registration but not the ownership of the copy
    if os.getpid() == owner:
        with contextlib.suppress(OSError):
            copy.unlink()
