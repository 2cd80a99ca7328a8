"""What every command shares: the error handler, JSON output, tables and messages.

This package is the only place that prints, reads argv or exits. Library calls return
data; the functions here format it.
"""

from __future__ import annotations

import contextlib
import functools
import io
import json
import os
import signal
import sys
from collections.abc import Callable, Iterator, Sequence
from typing import Any, ParamSpec, TypeVar

import typer
from rich.console import Console
from rich.progress import (
    BarColumn,
    MofNCompleteColumn,
    Progress,
    ProgressColumn,
    SpinnerColumn,
    Task,
    TaskProgressColumn,
    TextColumn,
    TimeElapsedColumn,
    TimeRemainingColumn,
)
from rich.table import Table
from rich.text import Text

from rescore.cli.flags import in_flags
from rescore.errors import RescoreError, UsageError
from rescore.outputs import DISK_FULL, STDOUT_NAME, disk_full_error
from rescore.progress import Report

P = ParamSpec("P")
R = TypeVar("R")

# nothing printed is markup: paths, ids and user strings such as 'run[v2].jsonl' or
# 'x[/]y.jsonl' are shown as they are (escaped at the console, so no call can forget)
stdout = Console(soft_wrap=True, markup=False, emoji=False, highlight=False)
stderr = Console(stderr=True, soft_wrap=True, markup=False, emoji=False, highlight=False)


class _State:
    debug = False
    quiet = False
    verbose = False
    # the command writes its data to standard output (-o -): its tables go to stderr
    stdout_taken = False


state = _State()


class Terminated(KeyboardInterrupt):
    """Raised by the SIGTERM handler so that every ``finally`` and atomic write unwinds."""


def _on_sigterm(signum: int, frame: object) -> None:
    raise Terminated()


def install_signal_handlers() -> None:
    signal.signal(signal.SIGTERM, _on_sigterm)


def fail(message: str, code: int = 1) -> typer.Exit:
    """Print one ``error:`` line on stderr and return the Exit to raise."""
    print(f"error: {message}", file=sys.stderr, flush=True)
    return typer.Exit(code)


def guarded(fn: Callable[P, R]) -> Callable[P, R]:
    """Turn library errors into one stderr line and the contract's exit code."""

    @functools.wraps(fn)
    def wrapper(*args: P.args, **kwargs: P.kwargs) -> R:
        try:
            return fn(*args, **kwargs)
        except typer.Exit:
            raise
        except RescoreError as exc:
            if state.debug:
                raise
            raise fail(in_flags(exc), exc.exit_code) from None
        except KeyboardInterrupt as exc:
            if state.debug:
                raise
            # the shell's convention: 128 + the signal's number
            if isinstance(exc, Terminated):
                raise fail("terminated; no output was written", 128 + signal.SIGTERM) \
                    from None
            raise fail("interrupted; no output was written", 128 + signal.SIGINT) from None
        except BrokenPipeError:
            # the reader of standard output went away (``| head``): stop quietly, as a
            # shell tool killed by SIGPIPE would, and keep Python from flushing into it
            os.dup2(os.open(os.devnull, os.O_WRONLY), sys.stdout.fileno())
            raise typer.Exit(128 + signal.SIGPIPE) from None
        except MemoryError:
            raise fail("out of memory; try a smaller batch or fewer workers") from None
        except OSError as exc:
            if state.debug:
                raise
            if exc.errno in DISK_FULL or exc.filename is not None:
                raise fail(_os_message(exc)) from None
            raise fail(_internal(exc)) from None
        except Exception as exc:
            if state.debug:
                raise
            raise fail(_internal(exc)) from None

    return wrapper


def _internal(exc: BaseException) -> str:
    return f"internal error ({type(exc).__name__}: {exc}); rerun with --debug and report it"


def _os_message(exc: OSError) -> str:
    """An error of the system on a named file (unreadable, full disk the writers did not
    see first): ``PATH: what is wrong``, as an input error would read."""
    path = exc.filename if exc.filename is not None else "output"
    if exc.errno in DISK_FULL:
        return str(disk_full_error(exc, path, 0)).replace(" (0 bytes written)", "")
    reason = (exc.strerror or type(exc).__name__).lower()
    return f"{path}: {reason}"


def _noop(amount: float = 1) -> None:
    pass


def bars_shown() -> bool:
    """Progress bars show on a terminal, never with --quiet or when stdout is redirected."""
    return not state.quiet and sys.stdout.isatty()


def _bar() -> Any:
    class RateColumn(ProgressColumn):
        def render(self, task: Task) -> Text:
            return Text(f"{task.speed:,.0f}/s" if task.speed else "")

    columns = [SpinnerColumn(), TextColumn("{task.description}", markup=False), BarColumn(),
               MofNCompleteColumn(), TaskProgressColumn(), RateColumn(), TimeElapsedColumn(),
               TimeRemainingColumn()]
    return Progress(*columns, console=stderr, transient=True)


@contextlib.contextmanager
def progress(description: str, total: float | None = None) -> Iterator[Callable[[float], None]]:
    """A progress bar on stderr with rate and time left; silent with --quiet or when stdout
    is not a terminal. Yields the function that advances it."""
    if not bars_shown():
        yield _noop
        return
    with _bar() as bar:
        task = bar.add_task(description, total=total)

        def advance(amount: float = 1) -> None:
            bar.advance(task, amount)

        yield advance


@contextlib.contextmanager
def stages(title: str) -> Iterator[Report | None]:
    """A progress bar that follows a library reporter (see :mod:`rescore.progress`): each
    stage restarts it with its own total, rate and time left. Yields None (no reporter, so
    the library skips even counting lines for totals) with --quiet or when stdout is not a
    terminal."""
    if not bars_shown():
        yield None
        return
    with _bar() as bar:
        task = bar.add_task(title, total=None)
        current: list[str | None] = [None]

        def report(stage: str, done: int, total: int | None) -> None:
            if stage != current[0]:
                if current[0] is not None:
                    bar.refresh()  # the finished stage is drawn once in its final state
                current[0] = stage
                bar.reset(task, total=total, completed=0, description=f"{title}: {stage}")
                bar.update(task, completed=done, total=total)
                bar.refresh()
                return
            bar.update(task, completed=done, total=total)

        yield report


def emit_json(data: Any) -> None:
    print(json.dumps(data, indent=2, ensure_ascii=False, allow_nan=False))


def info(message: str) -> None:
    """A progress or summary line on stderr, silent with --quiet."""
    if not state.quiet:
        # plain text: a path or grid such as 0:100:5 must not turn into markup or an emoji
        stderr.print(message, highlight=False, markup=False, emoji=False)


def warn(message: str, label: str = "warning") -> None:
    """A ``warning:`` (or other ``label:``) line on stderr, shown even with --quiet: it is
    not progress."""
    stderr.print(f"{label}: {message}", highlight=False, soft_wrap=True, markup=False)


def table(title: str | None, columns: Sequence[str], rows: Sequence[Sequence[object]]) -> None:
    """A table for a person: on stdout, or on stderr when the command's data goes to
    stdout (see :func:`take_stdout`)."""
    t = Table(title=title, title_justify="left", show_edge=False, pad_edge=False)
    for i, name in enumerate(columns):
        t.add_column(name, justify="left" if i == 0 else "right")
    for row in rows:
        t.add_row(*(fmt(v) for v in row))
    (stderr if state.stdout_taken else stdout).print(t)


def is_standard_output(path: object) -> bool:
    """Whether an output path is this process's standard output: ``-``, or a name of the
    same file (``/dev/stdout``, ``/proc/self/fd/1``, or the file stdout is redirected to)."""
    if path is None:
        return False
    if str(path) == STDOUT_NAME:
        return True
    try:
        here, std = os.stat(str(path)), os.fstat(sys.stdout.fileno())
    except (OSError, ValueError, io.UnsupportedOperation):
        return False
    return (here.st_dev, here.st_ino) == (std.st_dev, std.st_ino)


def take_stdout(outputs: Sequence[object], *, as_json: bool) -> None:
    """Keep standard output for data alone: when one of ``outputs`` is written there,
    ``--json`` is refused (the two would mix) and tables go to stderr."""
    taken = [o for o in outputs if is_standard_output(o)]
    state.stdout_taken = bool(taken)
    if taken and as_json:
        raise UsageError(f"--json and the output {taken[0]} would both write to standard "
                         "output: give a file")


def fmt(value: object) -> str:
    if value is None:
        return "-"
    if isinstance(value, float):
        return f"{value:.4f}"
    return str(value)


def pct(value: float | None) -> str:
    return "-" if value is None else f"{100 * value:.2f}%"
