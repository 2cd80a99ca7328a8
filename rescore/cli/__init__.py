"""The ``rescore`` command line: sub-apps composed in one place."""

from __future__ import annotations

import logging
import sys
from typing import Any

import typer
from typer.core import TyperGroup

from rescore.cli import aliases, helptext, lm
from rescore.cli._common import install_signal_handlers, state, warn
from rescore.process import avoid_huge_pages, keep_freed_memory
from rescore.version import __version__


class _Commands(TyperGroup):
    """The root group. Old option names are rewritten before parsing. Path arguments are
    not checked for access by the parser: an unreadable input is the reader's to report,
    as one ``error: PATH: permission denied`` line and exit 1 like a missing file, not as
    a usage error (exit 2)."""

    def __init__(self, *args: Any, **kwargs: Any) -> None:
        super().__init__(*args, **kwargs)
        _leave_access_to_readers(self)
        helptext.apply_help_style(self)

    def list_commands(self, ctx: Any) -> list[str]:
        return helptext.ordered(list(super().list_commands(ctx)), helptext.ORDER)

    def parse_args(self, ctx: Any, args: list[str]) -> list[str]:
        # old option names and global flags after the command: see rescore.cli.aliases
        args, notices = aliases.rewrite(args)
        for notice in notices:
            warn(notice)
        return list(super().parse_args(ctx, args))


def _leave_access_to_readers(command: Any) -> None:
    # typer keeps each parameter's settings (``readable`` among them) in its descriptor
    for param in getattr(command, "params", []):
        info: Any = getattr(getattr(param, "type_descriptor", None), "parameter_info", None)
        if getattr(info, "readable", False):
            info.readable = False
    for sub in getattr(command, "commands", {}).values():
        _leave_access_to_readers(sub)


_app = typer.Typer(
    name="rescore",
    cls=_Commands,
    help="Rescore recognizer N-best lists with n-gram language models, tune weights, report WER.",
    no_args_is_help=True,
    pretty_exceptions_enable=False,
    add_completion=False,
)
class _LmCommands(TyperGroup):
    def list_commands(self, ctx: Any) -> list[str]:
        return helptext.ordered(list(super().list_commands(ctx)), helptext.LM_ORDER)


_lm_app = typer.Typer(help="Build, evaluate, mix and convert n-gram language models.",
                     no_args_is_help=True, cls=_LmCommands)
_app.add_typer(_lm_app, name="lm")


def _version(value: bool) -> None:
    if value:
        print(f"rescore {__version__}")
        raise typer.Exit()


@_app.callback()
def _root(
    debug: bool = typer.Option(False, "--debug", help="Show full tracebacks for errors."),
    quiet: bool = typer.Option(False, "--quiet", "-q", help="No progress or summary lines."),
    verbose: bool = typer.Option(False, "--verbose", "-v", help="More detail on stderr."),
    version: bool = typer.Option(False, "--version", callback=_version, is_eager=True,
                                 help="Print the version and exit."),
) -> None:
    state.debug, state.quiet, state.verbose = debug, quiet, verbose
    state.stdout_taken = False
    if verbose or debug:
        logging.basicConfig(level=logging.DEBUG if debug else logging.INFO,
                            format="%(asctime)s %(name)s: %(message)s", stream=sys.stderr,
                            force=True)


def _register(*, only_lm: bool = False) -> None:
    """Each module adds its commands to the app it is given; the composition is this one
    function. ``rescore lm ...`` needs the language-model commands alone, and skips loading
    the rest of the package (see tests/test_architecture.py for the time this saves);
    anything else (``rescore --help`` lists every command) registers all of them."""
    if "lm" not in _registered:
        lm.register(_app, _lm_app)
        _registered.add("lm")
    if not only_lm and "rest" not in _registered:
        import rescore.cli.commands
        import rescore.cli.report
        rescore.cli.commands.register(_app, _lm_app)
        rescore.cli.report.register(_app, _lm_app)
        _registered.add("rest")


_registered: set[str] = set()  # which of the two parts are registered


def _command(args: list[str]) -> str | None:
    """The first word of ``args`` that is not an option: the command asked for."""
    return next((a for a in args if not a.startswith("-")), None)


def __getattr__(name: str) -> Any:
    # ``app`` and ``lm_app`` for a test runner or a caller in Python (PEP 562): every
    # command registered first
    if name in ("app", "lm_app"):
        _register()
        return _app if name == "app" else _lm_app
    raise AttributeError(f"module 'rescore.cli' has no attribute {name!r}")


def main() -> None:
    _register(only_lm=_command(aliases.rewrite(sys.argv[1:])[0]) == "lm")
    avoid_huge_pages()
    keep_freed_memory()
    install_signal_handlers()
    _app()
