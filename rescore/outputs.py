"""Atomic outputs: files that appear whole, together, or not at all; the output checks
made before any work; and the one wording of a full disk."""

from __future__ import annotations

import contextlib
import errno
import fcntl
import gzip
import io
import os
import re
import stat
import sys
import tempfile
from collections.abc import Iterator, Mapping, Sequence
from pathlib import Path
from typing import IO, Any, Literal, Protocol, overload

from rescore.compression import is_gzip_name
from rescore.errors import InputError, OutputError, UsageError
from rescore.leftovers import TMP_PREFIX, remove_stale_temporaries


def _umask() -> int:
    current = os.umask(0)
    os.umask(current)
    return current


# mkstemp makes files private (0600); outputs get the mode an ordinary open() would give
FILE_MODE = 0o666 & ~_umask()

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


STDOUT_NAME = "-"


def is_direct_output(path: str | Path) -> bool:
    """Whether ``path`` is written to directly, streaming, instead of by temporary and
    rename: ``-`` (standard output) and any existing target that is not a regular file or a
    folder once links are followed (a device, a FIFO, a socket, ``/proc/self/fd/1``).
    Renaming over such a file would replace it, so it is never renamed over; atomicity
    then does not apply."""
    if str(path) == STDOUT_NAME or names_a_descriptor(path):
        return True
    try:
        mode = os.stat(path).st_mode
    except OSError:
        return False
    return not stat.S_ISREG(mode) and not stat.S_ISDIR(mode)


_DESCRIPTOR = re.compile(r"/(?:proc/(?:self|thread-self|\d+)/fd|dev/fd)/\d+|/dev/std(?:in|out|err)")


def names_a_descriptor(path: str | Path) -> bool:
    """Whether ``path`` or a link on the way names an open file descriptor (``/dev/stdout``,
    ``/dev/fd/3``, ``/proc/self/fd/1``). Such a name is written through even when the
    descriptor is a regular file (standard output redirected to one): renaming a temporary
    over it would replace the link itself (``/dev/stdout`` turned into a file of its own),
    and the shell's file would never see the output."""
    name = os.path.abspath(path)
    for _ in range(40):  # the kernel's own limit on links followed
        if _DESCRIPTOR.fullmatch(name):
            return True
        try:
            target = os.readlink(name)
        except OSError:
            return False
        name = os.path.normpath(os.path.join(os.path.dirname(name), target))
    return False


def check_output_path(path: str | Path | None) -> None:
    """Refuse, before any work, an output path that writing would refuse at the end: one
    whose folder is missing or not writable, that is itself a folder, or a special file
    that cannot be opened for writing. Nothing is created."""
    if path is None or str(path) == STDOUT_NAME:
        return
    target = Path(path)
    if is_direct_output(target):
        if not os.access(target, os.W_OK):
            raise InputError("permission denied (cannot write to it)", path=str(target))
        return
    folder = target.parent if str(target.parent) else Path(".")
    if not folder.is_dir():
        raise InputError("output folder does not exist", path=str(folder))
    if target.is_dir():
        raise InputError("is a folder, expected a file path", path=str(target))
    if not os.access(folder, os.W_OK | os.X_OK):
        raise InputError("output folder is not writable", path=str(folder))


def check_outputs(outputs: Sequence[str | Path | None],
                  inputs: Sequence[str | Path | None] = ()) -> None:
    """:func:`check_output_path` for each output, and refuse an output that is one of the
    inputs (the same file by device and inode, so links and other spellings are caught):
    writing it would destroy what the command reads. Standard streams and special files
    are not compared (a terminal may well be both)."""
    for out in outputs:
        check_output_path(out)
    check_not_inputs(outputs, inputs)


def check_not_inputs(outputs: Sequence[str | Path | None],
                     inputs: Sequence[str | Path | None]) -> None:
    """Refuse an output that is the same file as one of the inputs (see
    :func:`check_outputs`)."""
    read = {_identity(p) for p in inputs if p is not None}
    read.discard(None)
    for out in outputs:
        if out is not None and _identity(out) in read:
            raise UsageError(f"{out}: the output is one of the inputs; name another file")


def _identity(path: str | Path) -> tuple[int, int] | None:
    if str(path) == STDOUT_NAME:
        return None
    try:
        st = os.stat(path)
    except OSError:
        return None
    return (st.st_dev, st.st_ino) if stat.S_ISREG(st.st_mode) else None


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
        self._layers(target, mode)

    def _layers(self, target: Path, mode: str) -> None:
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
        self._flush_layers()
        os.fchmod(self.raw.fileno(), FILE_MODE)
        try:
            os.fsync(self.raw.fileno())  # where space is claimed late (NFS), fsync is told
        except OSError as exc:
            if self.file.error is None:
                self.file.error = exc
            raise
        self.raw.close()

    def _flush_layers(self) -> None:
        if self.text is not None:
            self.text.flush()
            self.text.detach()
        if self.gz is not None:
            self.gz.close()
        self.raw.flush()

    def commit(self) -> None:
        os.replace(self.tmp_name, self.target)

    def abort(self) -> None:
        with contextlib.suppress(Exception):
            self.raw.close()
        with contextlib.suppress(FileNotFoundError):
            os.unlink(self.tmp_name)


class _Direct(_Pending):
    """An output written straight to its target (see :func:`is_direct_output`): the same
    layers as a temporary's, but nothing to sync, chmod or rename, and nothing to remove."""

    def __init__(self, target: Path, mode: str) -> None:
        self.target = target
        if str(target) == STDOUT_NAME:
            sys.stdout.flush()
            fd = os.dup(sys.stdout.fileno())
        else:
            try:
                fd = os.open(target, os.O_WRONLY)
            except OSError as exc:
                raise InputError(f"cannot write to it ({exc.strerror})", path=str(target)) \
                    from None
        self.tmp_name = ""
        self.file = _CountingFile(fd, "wb")
        self.raw = io.BufferedWriter(self.file, 1 << 16)
        self._layers(target, mode)

    def finish(self) -> None:
        self._flush_layers()
        self.raw.close()

    def commit(self) -> None:
        pass

    def abort(self) -> None:
        with contextlib.suppress(Exception):
            self.raw.close()


def _open_output(target: Path, mode: str) -> _Pending:
    return _Direct(target, mode) if is_direct_output(target) else _Pending(target, mode)


@contextlib.contextmanager
def _atomic_outputs(paths: Sequence[str | Path], mode: str) -> Iterator[list[Any]]:
    targets = [Path(p) for p in paths]
    first: dict[Path, Path] = {}
    for t in targets:
        real = t.resolve()
        if real in first:
            why = "" if real in (t.absolute(), first[real].absolute()) else \
                f" (through links, both are {real})"
            raise UsageError(f"{first[real]} and {t} are one file{why}: each output of a "
                             "command must be a file of its own")
        first[real] = t
    pending: list[_Pending] = []
    try:
        for target in targets:
            pending.append(_open_output(target, mode))
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

