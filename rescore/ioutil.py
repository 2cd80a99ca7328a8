"""File plumbing shared by every reader and writer: atomic outputs, gzip, checksums, lines."""

from __future__ import annotations

import contextlib
import gzip
import hashlib
import io
import json
import os
import re
import shutil
import tempfile
import zlib
from collections.abc import Callable, Iterator, Mapping, Sequence
from pathlib import Path
from typing import IO, Any, Literal, Protocol, cast, overload

from rescore.errors import InputError, UsageError

GZIP_MAGIC = b"\x1f\x8b"


def _umask() -> int:
    current = os.umask(0)
    os.umask(current)
    return current


# mkstemp makes files private (0600); outputs get the mode an ordinary open() would give
FILE_MODE = 0o666 & ~_umask()
TMP_PREFIX = ".rescore-tmp-"

# Caps on hostile or broken input (README "Guarantees"); each breach is a one-line error.
# One line of text (a corpus sentence, a reference, an ARPA entry): far beyond any sentence.
TEXT_LINE_LIMIT = 8 << 20
# JSON files read whole: a weights file holds a few numbers and its provenance; a tuning
# analysis file holds the error surface (about 16 bytes a grid cell: 4 million cells fit).
WEIGHTS_FILE_LIMIT = 16 << 20
ANALYSIS_FILE_LIMIT = 64 << 20
# Nesting reported when a JSON file is too deep to parse (the files above need a handful).
JSON_DEPTH_REPORTED = 100


def is_gzip_name(path: str | Path) -> bool:
    return str(path).endswith(".gz")


@overload
def atomic_output(
    path: str | Path, mode: Literal["w"] = "w"
) -> contextlib.AbstractContextManager[IO[str]]: ...


@overload
def atomic_output(
    path: str | Path, mode: Literal["wb"]
) -> contextlib.AbstractContextManager[IO[bytes]]: ...


def atomic_output(
    path: str | Path, mode: Literal["w", "wb"] = "w"
) -> contextlib.AbstractContextManager[IO[str]] | contextlib.AbstractContextManager[IO[bytes]]:
    """Yield a file that appears at ``path`` only once the block completes without error.

    The data goes to a temporary file in the same folder, which is flushed, synced and
    renamed over ``path`` (an atomic replace on POSIX). Any exception, KeyboardInterrupt
    included, removes the temporary file and leaves ``path`` untouched. A name ending in
    ``.gz`` is gzip-compressed with a zero timestamp, so equal data gives equal bytes.
    """
    return _atomic_output(path, mode)


@overload
def atomic_outputs(
    paths: Sequence[str | Path], mode: Literal["w"] = "w"
) -> contextlib.AbstractContextManager[list[IO[str]]]: ...


@overload
def atomic_outputs(
    paths: Sequence[str | Path], mode: Literal["wb"]
) -> contextlib.AbstractContextManager[list[IO[bytes]]]: ...


def atomic_outputs(
    paths: Sequence[str | Path], mode: Literal["w", "wb"] = "w"
) -> (contextlib.AbstractContextManager[list[IO[str]]]
      | contextlib.AbstractContextManager[list[IO[bytes]]]):
    """Several outputs that appear together: one file per path, as :func:`atomic_output`.

    Every temporary is written, flushed and synced first; only then are they renamed into
    place, back to back, so an interruption before that point leaves none of them and the
    window in which some are new and some are not is a few renames long.
    """
    return _atomic_outputs(paths, mode)


@contextlib.contextmanager
def _atomic_output(path: str | Path, mode: str) -> Iterator[Any]:
    with _atomic_outputs([path], mode) as (fh,):
        yield fh


def check_output_path(path: str | Path | None) -> None:
    """Refuse, before any work, an output path that writing would refuse at the end: one
    whose folder is missing, or that is itself a folder. Nothing is created."""
    if path is None:
        return
    target = Path(path)
    folder = target.parent if str(target.parent) else Path(".")
    if not folder.is_dir():
        raise InputError("output folder does not exist", path=str(folder))
    if target.is_dir():
        raise InputError("is a folder, expected a file path", path=str(target))


class _Pending:
    """One output being written: a temporary file beside its target."""

    def __init__(self, target: Path, mode: str) -> None:
        check_output_path(target)
        folder = target.parent if str(target.parent) else Path(".")
        remove_stale_temporaries(folder, target.name)
        self.target = target
        fd, self.tmp_name = tempfile.mkstemp(
            prefix=f"{TMP_PREFIX}{target.name}.{os.getpid()}.", dir=folder)
        try:
            self.raw = os.fdopen(fd, "wb")
        except BaseException:
            os.close(fd)
            os.unlink(self.tmp_name)
            raise
        self.gz: gzip.GzipFile | None = None
        binary: IO[bytes] = self.raw
        if is_gzip_name(target):
            self.gz = gzip.GzipFile(filename="", mode="wb", fileobj=self.raw, mtime=0)
            binary = self.gz  # type: ignore[assignment]
        self.text: io.TextIOWrapper | None = None
        self.handle: IO[Any] = binary
        if mode != "wb":
            self.text = io.TextIOWrapper(binary, encoding="utf-8", newline="\n")
            self.handle = self.text

    def finish(self) -> None:
        """Flush every layer and sync the temporary to disk."""
        if self.text is not None:
            self.text.flush()
            self.text.detach()
        if self.gz is not None:
            self.gz.close()
        self.raw.flush()
        os.fchmod(self.raw.fileno(), FILE_MODE)
        os.fsync(self.raw.fileno())
        self.raw.close()

    def commit(self) -> None:
        os.replace(self.tmp_name, self.target)

    def abort(self) -> None:
        with contextlib.suppress(Exception):
            self.raw.close()
        with contextlib.suppress(FileNotFoundError):
            os.unlink(self.tmp_name)


@contextlib.contextmanager
def _atomic_outputs(paths: Sequence[str | Path], mode: str) -> Iterator[list[Any]]:
    targets = [Path(p) for p in paths]
    if len({t.resolve() for t in targets}) != len(targets):
        raise UsageError("the same file is named for two outputs: "
                         + ", ".join(str(t) for t in targets))
    pending: list[_Pending] = []
    try:
        for target in targets:
            pending.append(_Pending(target, mode))
        yield [p.handle for p in pending]
        for p in pending:
            p.finish()
        for p in pending:  # every temporary is complete: now the renames, back to back
            p.commit()
    except BaseException:
        for p in pending:
            p.abort()
        raise


def _pid_alive(pid: int) -> bool:
    try:
        os.kill(pid, 0)
    except ProcessLookupError:
        return False
    except PermissionError:
        return True
    return True


def remove_stale_temporaries(folder: Path, name: str) -> None:
    """Delete temporaries of ``name`` left by a killed run (their writer's pid is gone)."""
    prefix = f"{TMP_PREFIX}{name}."
    for leftover in folder.glob(f"{TMP_PREFIX}*"):
        rest = leftover.name[len(prefix):] if leftover.name.startswith(prefix) else ""
        pid_text = rest.split(".", 1)[0]
        if pid_text.isdigit() and not _pid_alive(int(pid_text)):
            with contextlib.suppress(OSError):
                if leftover.is_dir():
                    shutil.rmtree(leftover)
                else:
                    leftover.unlink()


def write_text_atomic(path: str | Path, text: str) -> None:
    with atomic_output(path) as fh:
        fh.write(text)


def write_texts_atomic(files: Mapping[Path, str]) -> None:
    """Write several text files that appear together (see :func:`atomic_outputs`)."""
    paths = list(files)
    with atomic_outputs(paths) as handles:
        for path, fh in zip(paths, handles, strict=True):
            fh.write(files[path])


class TextSink(Protocol):
    def write(self, text: str, /) -> int: ...


class LineCounter:
    """Passes text on to ``sink`` and counts the line ends in it: the records written.

    The accounting checks compare this count, taken from what actually went to the file,
    with the number of records read.
    """

    def __init__(self, sink: TextSink) -> None:
        self._sink = sink
        self.lines = 0

    def write(self, text: str, /) -> int:
        self.lines += text.count("\n")
        return self._sink.write(text)


def open_binary(path: str | Path) -> IO[bytes]:
    """Open a file for reading, decompressing gzip by its magic bytes (not just its name)."""
    p = Path(path)
    try:
        fh: IO[bytes] = open(p, "rb")  # noqa: SIM115 - returned to the caller
    except FileNotFoundError:
        raise InputError("file not found", path=str(p)) from None
    except IsADirectoryError:
        raise InputError("is a folder, expected a file", path=str(p)) from None
    except PermissionError:
        raise InputError("permission denied", path=str(p)) from None
    head = fh.read(2)
    fh.seek(0)
    if head == GZIP_MAGIC:
        fh.close()
        return cast(IO[bytes], gzip.open(p, "rb"))
    return fh


def iter_text_lines(
    path: str | Path,
    max_line_bytes: int | None = TEXT_LINE_LIMIT,
    *,
    start: int = 0,
    end: int | None = None,
    first_line: int = 1,
) -> Iterator[tuple[int, str]]:
    """Yield ``(line_number, text)`` for each line, decoded as strict UTF-8.

    Bad bytes and lines over ``max_line_bytes`` (by default :data:`TEXT_LINE_LIMIT`; None
    for no cap) raise :class:`InputError` naming the line and the byte offset; a damaged gzip
    stream is reported the same way. The line ending is removed.
    ``start``/``end`` (byte offsets at line starts, uncompressed files only) read one shard,
    numbering its lines from ``first_line``.
    """
    offset = start
    number = first_line - 1
    with open_binary(path) as fh:
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
                raise InputError(f"line longer than the limit of {_size(max_line_bytes)}",
                                 path=path, line=number)
            try:
                text = raw.decode("utf-8")
            except UnicodeDecodeError as exc:
                raise _bad_utf8(path, number, raw, exc, offset) from None
            offset += len(raw)
            yield number, text.rstrip("\r\n")


def _size(n: int) -> str:
    return f"{n >> 20} MiB" if n >= 1 << 20 and n % (1 << 20) == 0 else f"{n} bytes"


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
        raise InputError(f"larger than the limit of {_size(max_bytes)} for this file",
                         path=path)
    try:
        text = data.decode("utf-8")
    except UnicodeDecodeError as exc:
        raise _bad_utf8(path, data.count(b"\n", 0, exc.start) + 1, data, exc) from None
    try:
        return json.loads(text, parse_constant=parse_constant)
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


def count_lines(path: str | Path) -> int | None:
    """Newlines in an uncompressed file (one fast sequential read); None for gzip or when
    the file cannot be read (the reader then reports why)."""
    count = 0
    try:
        if is_gzip_file(path):
            return None
        with open(path, "rb") as fh:
            for block in iter(lambda: fh.read(1 << 22), b""):
                count += block.count(b"\n")
    except OSError:
        return None
    return count


def is_gzip_file(path: str | Path) -> bool:
    with open(path, "rb") as fh:
        return fh.read(2) == GZIP_MAGIC


def line_shards(path: str | Path, parts: int, min_bytes: int = 1 << 20
                ) -> list[tuple[int, int, int]]:
    """Split an uncompressed file into ``(start, end, first_line)`` byte ranges at line starts.

    At most ``parts`` shards, each of at least ``min_bytes`` (but the last), found by
    counting newlines in blocks, so it costs one sequential read.
    """
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


def sha256_file(path: str | Path) -> str:
    digest = hashlib.sha256()
    with open(path, "rb") as fh:
        for block in iter(lambda: fh.read(1 << 20), b""):
            digest.update(block)
    return digest.hexdigest()
