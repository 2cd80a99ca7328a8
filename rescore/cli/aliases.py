"""The command line's words before typer reads them: old option names, and global options
written after the command.

One table holds every renamed option, by command. An old spelling keeps working for one
release: it is rewritten to the new one before parsing, and one line on stderr says so
(``warning: --cutoffs is deprecated; use --min-ngram-counts``). The old names appear in no
help page. Global options (``-q``, ``--verbose``, ``--debug``) are accepted after the
command as well as before it: they are moved to the front.
"""

from __future__ import annotations

from collections.abc import Sequence

# command path -> {old option: new option}
RENAMED: dict[tuple[str, ...], dict[str, str]] = {
    ("lm", "build"): {
        "--cutoffs": "--min-ngram-counts",
        "--prune": "--prune-entropy",
        "--vocab": "--vocabulary",
        "--closed-vocab": "--no-unknown-word",
        "--output": "--out",
    },
    ("lm", "mix"): {"--weights": "--fixed-weights", "--output": "--out"},
    ("lm", "perplexity"): {"--sentence-scores": "--per-sentence"},
}

GLOBAL_FLAGS = frozenset({"-q", "--quiet", "-v", "--verbose", "--debug"})
GROUPS = frozenset({"lm"})


def _command(argv: Sequence[str]) -> tuple[tuple[str, ...], int]:
    """The command path and the index of the first argument after it."""
    path: list[str] = []
    i = 0
    while i < len(argv):
        word = argv[i]
        if word == "--":
            break
        if word.startswith("-"):
            if path:
                break
            i += 1
            continue
        path.append(word)
        i += 1
        if path[0] not in GROUPS or len(path) == 2:
            break
    return tuple(path), i


def rewrite(argv: Sequence[str]) -> tuple[list[str], list[str]]:
    """``argv`` (without the program name) with old names replaced and global flags moved
    to the front, and the deprecation notices to print."""
    path, start = _command(argv)
    head, rest = list(argv[:start]), list(argv[start:])
    renamed = RENAMED.get(path, {})
    notices: list[str] = []
    moved: list[str] = []
    out: list[str] = []
    for i, word in enumerate(rest):
        if word == "--":
            out.extend(rest[i:])
            break
        name, eq, value = word.partition("=")
        if name in renamed:
            new = renamed[name]
            notice = f"{name} is deprecated; use {new}"
            if notice not in notices:
                notices.append(notice)
            out.append(new + eq + value)
        elif word in GLOBAL_FLAGS and path:
            moved.append(word)
        else:
            out.append(word)
    return moved + head + out, notices
