"""File plumbing shared by every reader and writer: atomic outputs, gzip, checksums, lines."""

from __future__ import annotations

import contextlib
import errno
import fcntl
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

import numpy as np

from rescore.errors import InputError, OutputError, UsageError

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
# Blank lines skipped in a row by every line reader: a file of nothing but line breaks
# (a few MB of gzip unpack to billions of them) is refused instead of read for hours.
BLANK_RUN_LIMIT = 1_000_000
# A gzip input may unpack to this many times its compressed size (and to this floor
# whatever its size). Real N-best lists and corpus text unpack to 7 to 10 times (measured
# on the demo data and the recognizer sample); gzip's ceiling is about 1,030 times.
GZIP_RATIO_LIMIT = 100
GZIP_FLOOR_BYTES = 16 << 20
GZIP_RATIO_VARIABLE = "RESCORE_GZIP_MAX_RATIO"

# Write errors that mean the file system is full for this file; each ends a command with
# ``error: PATH: no space left on device (N bytes written)``.
DISK_FULL = {errno.ENOSPC: "", errno.EDQUOT: "disk quota exceeded",
             errno.EFBIG: "file size limit reached"}


def disk_full_error(exc: OSError, path: str | Path, written: int) -> OutputError:
    """The one wording of a full disk (or quota, or file size limit) for every writer."""
    why = DISK_FULL.get(exc.errno or 0, "")
    return OutputError(f"no space left on device{': ' + why if why else ''} "
                       f"({written} bytes written)", path=str(path))


def is_disk_full(exc: BaseException) -> bool:
    return isinstance(exc, OSError) and exc.errno in DISK_FULL


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


class _CountingFile(io.FileIO):
    """The temporary's file descriptor: counts the bytes that reached the file and keeps
    the first write error, so a full disk can be reported for the right output."""

    written = 0
    error: OSError | None = None

    def write(self, data: Any, /) -> int:
        try:
            n = super().write(data)
        except OSError as exc:
            if self.error is None:
                self.error = exc
            raise
        self.written += n or 0
        return n or 0


class _Pending:
    """One output being written: a temporary file beside its target.

    The temporary is locked (``flock``) for as long as it is open, so a later run removes
    a leftover only when its writer is provably gone: the kernel drops the lock when the
    process dies, in whatever PID namespace it ran.
    """

    def __init__(self, target: Path, mode: str) -> None:
        check_output_path(target)
        folder = target.parent if str(target.parent) else Path(".")
        remove_stale_temporaries(folder, target.name)
        self.target = target
        fd, self.tmp_name = tempfile.mkstemp(
            prefix=f"{TMP_PREFIX}{target.name}.{os.getpid()}.", dir=folder)
        try:
            fcntl.flock(fd, fcntl.LOCK_EX | fcntl.LOCK_NB)
            self.file = _CountingFile(fd, "wb")
            self.raw = io.BufferedWriter(self.file, 1 << 16)
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
        try:
            os.fsync(self.raw.fileno())  # where space is claimed late (NFS), fsync is told
        except OSError as exc:
            if self.file.error is None:
                self.file.error = exc
            raise
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
    except BaseException as exc:
        full = next((p for p in pending if p.file.error is not None
                     and is_disk_full(p.file.error)), None)
        for p in pending:
            p.abort()
        if full is not None and full.file.error is not None:
            raise disk_full_error(full.file.error, full.target, full.file.written) from None
        if is_disk_full(exc) and isinstance(exc, OSError) and len(pending) == 1:
            # a layer above the file (a text or gzip buffer) saw it first
            raise disk_full_error(exc, pending[0].target, pending[0].file.written) from None
        raise


def _pid_alive(pid: int) -> bool:
    try:
        os.kill(pid, 0)
    except ProcessLookupError:
        return False
    except PermissionError:
        return True
    return True


SCRATCH_LOCK = "lock"


def _lock_free(path: Path) -> bool:
    """Whether nobody holds the ``flock`` of ``path`` (a temporary, or a scratch folder's
    lock file): taking it, briefly, proves that the run which held it is gone. A folder
    without a lock file (one made by an older version) counts as free."""
    target = path / SCRATCH_LOCK if path.is_dir() else path
    try:
        fd = os.open(target, os.O_RDONLY)
    except FileNotFoundError:
        return path.is_dir()
    except OSError:
        return False
    try:
        fcntl.flock(fd, fcntl.LOCK_EX | fcntl.LOCK_NB)
    except OSError:
        return False
    finally:
        os.close(fd)
    return True


def remove_stale_temporaries(folder: Path, name: str) -> None:
    """Delete temporaries and scratch folders of ``name`` left by a killed run.

    Both signs must agree: nobody holds the leftover's lock, and no process of its pid runs
    here. (The lock alone proves it across PID namespaces; the pid closes the instant
    between a temporary's creation and its locking.)
    """
    prefix = f"{TMP_PREFIX}{name}."
    for leftover in folder.glob(f"{TMP_PREFIX}*"):
        rest = leftover.name[len(prefix):] if leftover.name.startswith(prefix) else ""
        pid_text = rest.split(".", 1)[0]
        if pid_text.isdigit() and not _pid_alive(int(pid_text)) and _lock_free(leftover):
            with contextlib.suppress(OSError):
                if leftover.is_dir():
                    shutil.rmtree(leftover)
                else:
                    leftover.unlink()


@contextlib.contextmanager
def scratch_folder(target: Path, label: str) -> Iterator[Path]:
    """A locked scratch folder beside ``target`` for one run, removed when the block ends.

    The run holds the ``flock`` of the folder's lock file for its whole life; a run killed
    with SIGKILL leaves the folder, and the next run writing the same output removes it
    once it can take that lock (see :func:`remove_stale_temporaries`).
    """
    folder = target.parent if str(target.parent) else Path(".")
    remove_stale_temporaries(folder, target.name)
    scratch = Path(tempfile.mkdtemp(prefix=f"{TMP_PREFIX}{target.name}.{os.getpid()}.{label}.",
                                    dir=folder))
    try:
        fd = os.open(scratch / SCRATCH_LOCK, os.O_RDWR | os.O_CREAT, 0o600)
        try:
            fcntl.flock(fd, fcntl.LOCK_EX | fcntl.LOCK_NB)
            yield scratch
        finally:
            os.close(fd)
    finally:
        shutil.rmtree(scratch, ignore_errors=True)


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


def _gzip_bomb(path: str | Path, limit: int, line: int | None) -> InputError:
    return InputError(f"gzip data unpacks to more than {_size(limit)}, over "
                      f"{gzip_ratio_limit()} times its compressed size (a decompression "
                      f"bomb?); set {GZIP_RATIO_VARIABLE} to allow more", path=path, line=line)


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
                raise InputError(f"line longer than the limit of {_size(max_line_bytes)}",
                                 path=path, line=number)
            try:
                text = raw.decode("utf-8")
            except UnicodeDecodeError as exc:
                raise _bad_utf8(path, number, raw, exc, offset) from None
            offset += len(raw)
            if unpacked is not None and offset > unpacked:
                raise _gzip_bomb(path, unpacked, number)
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
