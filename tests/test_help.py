"""Every help page a person can read: no type labels such as ``<bool>`` or Python type
names, and an example on every page (walks the whole command tree)."""

from __future__ import annotations

import re

import pytest
import typer.main

from rescore.cli import app
from tests.conftest import run


def _paths() -> list[tuple[str, ...]]:
    root = typer.main.get_command(app)
    found: list[tuple[str, ...]] = []

    def walk(command: object, path: tuple[str, ...]) -> None:
        found.append(path)
        for name, sub in getattr(command, "commands", {}).items():
            walk(sub, (*path, name))
    walk(root, ())
    return found


# type labels typer or click would print for a parameter without a metavar
TYPE_WORDS = re.compile(r"<[a-z ]+>|\b(?:INTEGER|TEXT|FLOAT|BOOLEAN|PATH|int|str|float|bool|"
                        r"Path)\b(?!-)")


@pytest.mark.parametrize("path", _paths(), ids=lambda p: " ".join(p) or "rescore")
def test_help_page_has_no_type_names_and_an_example(path: tuple[str, ...]) -> None:
    res = run([*path, "--help"])
    assert res.exit_code == 0
    page = res.stdout
    # <unk> and <TAB> are words of the trade's formats, not type labels
    cleaned = page.replace("<unk>", "").replace("<TAB>", "").replace("<s>", "")
    assert not TYPE_WORDS.findall(cleaned), TYPE_WORDS.findall(cleaned)
    assert "Example: rescore" in page


def test_commands_are_listed_in_the_order_of_the_job() -> None:
    page = run(["--help"]).stdout
    names = [n for n in ("lm", "check", "tune", "apply", "wer", "report", "demo")
             if re.search(rf"│ {n}\s", page)]
    positions = [page.index(f"│ {n} ") for n in names]
    assert len(names) == 7 and positions == sorted(positions)
