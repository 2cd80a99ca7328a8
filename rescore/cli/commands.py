"""Foundation commands: check, tune, apply, wer, demo, lm build, lm perplexity."""

from __future__ import annotations

import typer


def register(app: typer.Typer, lm_app: typer.Typer) -> None:
    """Attach this module's commands (filled in by the foundation work)."""
