"""Capped readers: text lines (strict UTF-8, line and blank-run caps), whole JSON files,
and gzip unpacked to a file; every fault is one :class:`InputError` naming the line."""

from __future__ import annotations

import errno
import gzip
import json
import os
import re
import zlib
from collections.abc import Callable, Iterator
from pathlib import Path
from typing import IO, Any

import numpy as np

from rescore.compression import gzip_bomb_error, gzip_unpacked_limit, open_binary
from rescore.errors import InputError
from rescore.limits import (
    BLANK_RUN_LIMIT,
    JSON_DEPTH_REPORTED,
    TEXT_LINE_LIMIT,
    describe_size,
)


def _blank_run(path: str | Path, line: int, limit: int) -> InputError:
    return InputError(f"more than {limit:,} blank lines in a row (from line "
                      f"{line - limit})", path=path, line=line)


def iter_text_lines(
    path: str | Path,
    max_line_bytes: int | None = TEXT_LINE_LIMIT,
    *,
    start: int = 0,
    end: int | None = None,
    first_line: int = 1,
    max_blank_run: int | None = BLANK_RUN_LIMIT,
) -> Iterator[tuple[int, str]]:
    """Yield ``(line_number, text)`` for each line, decoded as strict UTF-8.

    Bad bytes and lines over ``max_line_bytes`` (by default :data:`TEXT_LINE_LIMIT`; None
    for no cap) raise :class:`InputError` naming the line and the byte offset; a damaged gzip
    stream is reported the same way, and so are gzip data that unpack past
    :func:`gzip_unpacked_limit` and more than ``max_blank_run`` lines of only whitespace in
    a row. The line ending is removed.
    ``start``/``end`` (byte offsets at line starts, uncompressed files only) read one shard,
    numbering its lines from ``first_line``.
    """
    offset = start
    number = first_line - 1
    blanks = 0
    with open_binary(path) as fh:
        unpacked = gzip_unpacked_limit(fh)
        if start:
            fh.seek(start)
        while end is None or offset < end:
            try:
                raw = fh.readline() if max_line_bytes is None else fh.readline(max_line_bytes + 2)
            except (OSError, EOFError, zlib.error) as exc:
                raise InputError(f"cannot read compressed data ({exc})", path=path,
                                 line=number + 1) from None
            if not raw:
                return
            number += 1
            if max_line_bytes is not None and len(raw.rstrip(b"\r\n")) > max_line_bytes:
                raise InputError(f"line longer than the limit of {describe_size(max_line_bytes)}",
                                 path=path, line=number)
            try:
                text = raw.decode("utf-8")
            except UnicodeDecodeError as exc:
                raise _bad_utf8(path, number, raw, exc, offset) from None
            offset += len(raw)
            if unpacked is not None and offset > unpacked:
                raise gzip_bomb_error(path, unpacked, number)
            if text.isspace():  # stops at the first other character: cheap on real lines
                blanks += 1
                if max_blank_run is not None and blanks > max_blank_run:
                    raise _blank_run(path, number, max_blank_run)
            else:
                blanks = 0
            yield number, text.rstrip("\r\n")


def inflate(path: str | Path, dst: IO[bytes], max_line_bytes: int | None,
            max_blank_run: int | None = BLANK_RUN_LIMIT) -> int:
    """Unpack the gzip file ``path`` into ``dst`` in large blocks; returns the bytes written.

    Every fault is reported exactly as :func:`iter_text_lines` reports it, line included
    (the one-process reader): on a damaged stream, past the unpacked limit, or after a run
    of more than ``max_blank_run`` bare line breaks, the file is read again that way, up to
    the fault, to name it.
    """
    written = 0
    run = 0  # bare line breaks in a row, across blocks: a run of k holds k - 1 blank lines
    with open_binary(path) as src:
        limit = gzip_unpacked_limit(src)
        while True:
            try:
                block = src.read(1 << 20)
            except (OSError, EOFError, zlib.error):
                break
            if not block:
                return written
            written += len(block)
            if limit is not None and written > limit:
                break
            if max_blank_run is not None:
                lead = len(block) - len(block.lstrip(b"\n"))
                if run + lead > max_blank_run + 1:
                    break
                run = run + lead if lead == len(block) \
                    else len(block) - len(block.rstrip(b"\n"))
            view = memoryview(block)
            while view:  # an unbuffered file may take part of a block (a disk filling up)
                taken = dst.write(view)
                if not taken:
                    raise OSError(errno.ENOSPC, os.strerror(errno.ENOSPC))
                view = view[taken:]
    for _ in iter_text_lines(path, max_line_bytes, max_blank_run=max_blank_run):
        pass
    raise InputError("cannot read compressed data", path=path)  # the reader found it fine



def _bad_utf8(path: str | Path, line: int, data: bytes, exc: UnicodeDecodeError,
              base: int = 0) -> InputError:
    """The one wording of bad UTF-8 for every reader: the byte, its offset in the file."""
    return InputError(f"invalid UTF-8 byte 0x{data[exc.start]:02x} at byte offset "
                      f"{base + exc.start}", path=path, line=line)


def read_json(path: str | Path, max_bytes: int,
              parse_constant: Callable[[str], Any] | None = None) -> Any:
    """A whole JSON file (gzip by its magic bytes), no larger than ``max_bytes`` unpacked.

    Every problem is an :class:`InputError` naming the file and, where there is one, the
    line: too large, bad UTF-8 (with its byte offset, as :func:`iter_text_lines`), invalid
    JSON (with its column), or nesting too deep for the parser.
    """
    with open_binary(path) as fh:
        try:
            data = fh.read(max_bytes + 1)
        except (OSError, EOFError, zlib.error) as exc:
            raise InputError(f"cannot read compressed data ({exc})", path=path) from None
    if len(data) > max_bytes:
        raise InputError(f"larger than the limit of {describe_size(max_bytes)} for this file",
                         path=path)
    try:
        text = data.decode("utf-8")
    except UnicodeDecodeError as exc:
        raise _bad_utf8(path, data.count(b"\n", 0, exc.start) + 1, data, exc) from None
    try:
        return json.loads(text, parse_constant=parse_constant,
                          object_pairs_hook=refuse_duplicate_keys)
    except DuplicateKeyError as exc:
        raise InputError(f"key {exc.key!r} appears twice in one object (which one counts "
                         "would be a guess)", path=path, field=exc.key) from None
    except json.JSONDecodeError as exc:
        raise InputError(f"invalid JSON: {exc.msg} (column {exc.colno})", path=path,
                         line=exc.lineno, field="json") from None
    except RecursionError:
        raise InputError(f"JSON nested more than {JSON_DEPTH_REPORTED} levels deep",
                         path=path, line=_deep_line(text, JSON_DEPTH_REPORTED),
                         field="json") from None


_JSON_NESTING = re.compile(r'"(?:[^"\\]|\\.)*"|[\[\]{}]')


def _deep_line(text: str, limit: int) -> int | None:
    """The line where nesting first passes ``limit`` levels (strings skipped)."""
    depth = 0
    for match in _JSON_NESTING.finditer(text):
        token = match.group()
        if token in "[{":
            depth += 1
            if depth > limit:
                return text.count("\n", 0, match.start()) + 1
        elif token in "]}":
            depth -= 1
    return None



# every JSON string, with the colon after it when it is an object's key: consuming all
# strings as tokens means a key-like text inside a value is never counted
_JSON_STRING = re.compile(r'"(?:[^"\\]|\\.)*"(\s*:)?')
_SPACED_KEY = re.compile(r'"\s+:')


def duplicate_key(text: str, parsed_keys: int) -> str | None:
    """The first key that occurs twice in one object of the JSON ``text``, whose parse
    holds ``parsed_keys`` keys in all (see :func:`count_keys`), or None.

    Parsers keep the last of two equal keys without a word. Here the keys in the text are
    counted (a count in C where no escaped quote or space precedes a colon, else a scan of
    its strings) against those parsed; only a mismatch pays for a second, exact parse that
    names the key.
    """
    if '\\":' in text or _SPACED_KEY.search(text):
        in_text = sum(1 for m in _JSON_STRING.finditer(text) if m.group(1) is not None)
    else:  # no escaped quote before a colon, no space before one: each '":' ends a key
        in_text = text.count('":')
    if in_text == parsed_keys:
        return None
    found: list[str] = []

    def pairs(items: list[tuple[str, Any]]) -> dict[str, Any]:
        seen: set[str] = set()
        for key, _ in items:
            if key in seen and not found:
                found.append(key)
            seen.add(key)
        return dict(items)

    json.loads(text, object_pairs_hook=pairs)
    return found[0] if found else None


def count_keys(value: Any) -> int:
    """The keys of every object in a parsed JSON value."""
    count = 0
    stack = [value]
    while stack:
        item = stack.pop()
        if isinstance(item, dict):
            count += len(item)
            stack.extend(v for v in item.values() if isinstance(v, dict | list))
        elif isinstance(item, list):
            stack.extend(v for v in item if isinstance(v, dict | list))
    return count


def refuse_duplicate_keys(items: list[tuple[str, Any]]) -> dict[str, Any]:
    """``object_pairs_hook`` for whole JSON files: a key twice in one object is an error."""
    result: dict[str, Any] = {}
    for key, value in items:
        if key in result:
            raise DuplicateKeyError(key)
        result[key] = value
    return result


class DuplicateKeyError(ValueError):
    def __init__(self, key: str) -> None:
        super().__init__(key)
        self.key = key


TEXT_BLOCK_BYTES = 4 << 20  # a block of whole lines: large enough that per-block work is noise


def iter_text_blocks(
    path: str | Path,
    max_line_bytes: int | None = TEXT_LINE_LIMIT,
    *,
    block_bytes: int = TEXT_BLOCK_BYTES,
) -> Iterator[tuple[int, bytes]]:
    """Yield ``(first line number, data)`` for runs of whole lines, valid UTF-8.

    ``data`` holds the lines of about ``block_bytes`` of the file (the first blocks
    smaller, from 64 KiB doubling, so that progress shows early), separated by ``\\n``
    (the last line's ``\\n`` removed; a carriage return before it is kept, for the reader
    to treat as the white space it is). Lines are numbered, checked and refused exactly as
    :func:`iter_text_lines` does: a block with a problem (bad bytes, an over-long line, a
    damaged gzip stream) is read again line by line from its first line, which raises the
    same error at the same line.
    """
    number = 1  # of the pending block's first line
    offset = 0  # of the pending block's first byte (uncompressed)
    rest = b""
    size = min(block_bytes, 1 << 16)
    with open_binary(path) as fh:
        gzipped = isinstance(fh, gzip.GzipFile)
        while True:
            try:
                chunk = fh.read(size)
                size = min(2 * size, block_bytes)
            except (OSError, EOFError, zlib.error):
                break  # the line-by-line reader names the line
            buf = rest + chunk if rest else chunk
            if not buf:
                return
            cut = buf.rfind(b"\n")
            if chunk and cut < 0:
                if max_line_bytes is not None and len(buf) > max_line_bytes + 1:
                    break
                rest = buf  # one line longer than a block: read on
                continue
            data, rest = (buf, b"") if not chunk else (buf[:cut], buf[cut + 1:])
            if not _block_ok(data, max_line_bytes):
                break
            yield number, data
            number += data.count(b"\n") + 1
            offset += len(data) + 1
            if not chunk:
                return
    # the rare case of a problem: the line reader from the block's first line on
    yield from ((n, line.encode("utf-8")) for n, line in iter_text_lines(
        path, max_line_bytes, start=0 if gzipped else offset, first_line=1 if gzipped else number)
        if n >= number)


def _block_ok(data: bytes, max_line_bytes: int | None) -> bool:
    if max_line_bytes is not None and len(data) > max_line_bytes:
        ends = np.flatnonzero(np.frombuffer(data, dtype=np.uint8) == 10)
        if int(np.diff(ends, prepend=-1, append=len(data)).max()) - 1 > max_line_bytes:
            return False
    if data.isascii():
        return True
    try:
        data.decode("utf-8")
    except UnicodeDecodeError:
        return False
    return True
