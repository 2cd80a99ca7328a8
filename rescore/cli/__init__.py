"""The ``rescore`` command line: sub-apps composed in one place."""

from __future__ import annotations

import logging
import sys

import typer

from rescore import __version__
from rescore.cli._common import install_signal_handlers, state
from rescore.process import avoid_huge_pages, keep_freed_memory

app = typer.Typer(
    name="rescore",
    help="Rescore recognizer N-best lists with n-gram language models, tune weights, report WER.",
    no_args_is_help=True,
    pretty_exceptions_enable=False,
    add_completion=False,
)
lm_app = typer.Typer(help="Build, evaluate, mix and convert n-gram language models.",
                     no_args_is_help=True)
app.add_typer(lm_app, name="lm")


def _version(value: bool) -> None:
    if value:
        print(f"rescore {__version__}")
        raise typer.Exit()


@app.callback()
def _root(
    debug: bool = typer.Option(False, "--debug", help="Show full tracebacks for errors."),
    quiet: bool = typer.Option(False, "--quiet", "-q", help="No progress or summary lines."),
    verbose: bool = typer.Option(False, "--verbose", "-v", help="More detail on stderr."),
    version: bool = typer.Option(False, "--version", callback=_version, is_eager=True,
                                 help="Print the version and exit."),
) -> None:
    state.debug, state.quiet, state.verbose = debug, quiet, verbose
    if verbose or debug:
        logging.basicConfig(level=logging.DEBUG if debug else logging.INFO,
                            format="%(asctime)s %(name)s: %(message)s", stream=sys.stderr,
                            force=True)


def _register() -> None:
    # Each module adds its commands to the app it is given; imported here, not at the top,
    # so that the composition stays in this one function.
    from rescore.cli import commands, lm, report

    commands.register(app, lm_app)
    lm.register(app, lm_app)
    report.register(app, lm_app)

_register()


def main() -> None:
    avoid_huge_pages()
    keep_freed_memory()
    install_signal_handlers()
    app()
