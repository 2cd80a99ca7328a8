"""The one exception family of the library; the command line turns each into one line."""

from __future__ import annotations

from pathlib import Path


class RescoreError(Exception):
    """A problem the user can fix, located as precisely as we know.

    Rendered as ``PATH:LINE: FIELD: message``, leaving out the parts that are unknown.
    """

    exit_code = 1

    def __init__(
        self,
        message: str,
        *,
        path: str | Path | None = None,
        line: int | None = None,
        field: str | None = None,
    ) -> None:
        super().__init__(message)
        self.message = message
        self.path = None if path is None else str(path)
        self.line = line
        self.field = field

    def __reduce__(self) -> tuple[object, ...]:
        # keep path, line and field when an error crosses a process boundary
        return (_rebuild, (type(self), self.message, self.path, self.line, self.field))

    def __str__(self) -> str:
        parts: list[str] = []
        if self.path is not None:
            parts.append(self.path if self.line is None else f"{self.path}:{self.line}")
        if self.field:
            parts.append(self.field)
        parts.append(self.message)
        return ": ".join(parts)


def _rebuild(cls: type[RescoreError], message: str, path: str | None, line: int | None,
             field: str | None) -> RescoreError:
    return cls(message, path=path, line=line, field=field)


class InputError(RescoreError):
    """Bad input data: a malformed file, a missing reference, an impossible value."""


class ModelFileError(InputError):
    """A language-model file that is truncated, altered, foreign or of an unknown version."""


class OutputError(RescoreError):
    """An output that could not be written whole (a full disk, a quota, a file size limit);
    the previous file at its path is kept and no temporary is left."""


class AccountingError(RescoreError):
    """The records written do not match the utterances read: a defect, never written out."""


class UsageError(RescoreError):
    """Bad command-line usage that the argument parser itself cannot see."""

    exit_code = 2


class GateError(RescoreError):
    """A release gate was breached (``rescore report --max-wer/--max-regression``)."""

    exit_code = 3


class ParameterError(RescoreError, ValueError):
    """A Python argument out of its range or of the wrong kind; ``field`` is the
    parameter's name (the command line shows its own flag name instead)."""

    exit_code = 2


def open_failure(exc: FileNotFoundError | IsADirectoryError | PermissionError,
                 expected: str = "a file") -> str:
    """The one-line reason an ``open`` for reading failed, in the words every reader uses."""
    if isinstance(exc, FileNotFoundError):
        return "file not found"
    if isinstance(exc, IsADirectoryError):
        return f"is a folder, expected {expected}"
    return "permission denied"
