"""File plumbing shared by every reader and writer: atomic outputs, gzip, checksums, lines."""

from __future__ import annotations

import contextlib
import gzip
import hashlib
import io
import os
import tempfile
import zlib
from collections.abc import Iterator
from pathlib import Path
from typing import IO, Literal

from rescore.errors import InputError

GZIP_MAGIC = b"\x1f\x8b"
TMP_PREFIX = ".rescore-tmp-"


def is_gzip_name(path: str | Path) -> bool:
    return str(path).endswith(".gz")


@contextlib.contextmanager
def atomic_output(
    path: str | Path, mode: Literal["w", "wb"] = "w"
) -> Iterator[IO[str] | IO[bytes]]:
    """Yield a file that appears at ``path`` only once the block completes without error.

    The data goes to a temporary file in the same folder, which is flushed, synced and
    renamed over ``path`` (an atomic replace on POSIX). Any exception, KeyboardInterrupt
    included, removes the temporary file and leaves ``path`` untouched. A name ending in
    ``.gz`` is gzip-compressed with a zero timestamp, so equal data gives equal bytes.
    """
    target = Path(path)
    folder = target.parent if str(target.parent) else Path(".")
    if not folder.is_dir():
        raise InputError("output folder does not exist", path=str(folder))
    _remove_stale_temporaries(folder, target.name)
    fd, tmp_name = tempfile.mkstemp(prefix=f"{TMP_PREFIX}{target.name}.{os.getpid()}.",
                                    dir=folder)
    raw = os.fdopen(fd, "wb")
    gz: gzip.GzipFile | None = None
    try:
        binary: IO[bytes] = raw
        if is_gzip_name(target):
            gz = gzip.GzipFile(filename="", mode="wb", fileobj=raw, mtime=0)
            binary = gz  # type: ignore[assignment]
        if mode == "wb":
            yield binary
        else:
            text = io.TextIOWrapper(binary, encoding="utf-8", newline="\n")
            yield text
            text.flush()
            text.detach()
        if gz is not None:
            gz.close()
        raw.flush()
        os.fsync(raw.fileno())
        raw.close()
        os.replace(tmp_name, target)
    except BaseException:
        with contextlib.suppress(Exception):
            raw.close()
        with contextlib.suppress(FileNotFoundError):
            os.unlink(tmp_name)
        raise


def _pid_alive(pid: int) -> bool:
    try:
        os.kill(pid, 0)
    except ProcessLookupError:
        return False
    except PermissionError:
        return True
    return True


def _remove_stale_temporaries(folder: Path, name: str) -> None:
    """Delete temporaries of ``name`` left by a killed run (their writer's pid is gone)."""
    prefix = f"{TMP_PREFIX}{name}."
    for leftover in folder.glob(f"{TMP_PREFIX}*"):
        rest = leftover.name[len(prefix):] if leftover.name.startswith(prefix) else ""
        pid_text = rest.split(".", 1)[0]
        if pid_text.isdigit() and not _pid_alive(int(pid_text)):
            with contextlib.suppress(OSError):
                leftover.unlink()


def write_text_atomic(path: str | Path, text: str) -> None:
    with atomic_output(path, "w") as fh:
        fh.write(text)  # type: ignore[arg-type]


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
        return gzip.open(p, "rb")
    return fh


def iter_text_lines(path: str | Path, max_line_bytes: int | None = None) -> Iterator[tuple[int, str]]:
    """Yield ``(line_number, text)`` for each line, decoded as strict UTF-8.

    Bad bytes and over-long lines raise :class:`InputError` naming the line and the byte
    offset; a damaged gzip stream is reported the same way. The line ending is removed.
    """
    offset = 0
    number = 0
    with open_binary(path) as fh:
        while True:
            try:
                raw = fh.readline() if max_line_bytes is None else fh.readline(max_line_bytes + 2)
            except (OSError, EOFError, zlib.error) as exc:
                raise InputError(f"cannot read compressed data ({exc})", path=path, line=number + 1) from None
            if not raw:
                return
            number += 1
            if max_line_bytes is not None and len(raw.rstrip(b"\r\n")) > max_line_bytes:
                raise InputError(
                    f"line longer than the limit of {max_line_bytes} bytes", path=path, line=number
                )
            try:
                text = raw.decode("utf-8")
            except UnicodeDecodeError as exc:
                raise InputError(
                    f"invalid UTF-8 byte 0x{raw[exc.start]:02x} at byte offset {offset + exc.start}",
                    path=path,
                    line=number,
                ) from None
            offset += len(raw)
            yield number, text.rstrip("\r\n")


def sha256_file(path: str | Path) -> str:
    digest = hashlib.sha256()
    with open(path, "rb") as fh:
        for block in iter(lambda: fh.read(1 << 20), b""):
            digest.update(block)
    return digest.hexdigest()
