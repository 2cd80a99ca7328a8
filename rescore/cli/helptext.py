"""Help pages a person can read: metavars in one style, no type names, an example on every
page, commands in the order of the job.

Applied once to the whole command tree when the root group is built: every value option
without a metavar gets one from its type (``FILE``, ``DIR``, ``N``, ``X``, ``VALUE``, or
the choices), flags show no value, arguments show their metavar alone, and each command's
page ends with the example from :data:`EXAMPLES`.
"""

from __future__ import annotations

from typing import Any

from typer.core import TyperArgument, TyperOption

# the job's order: build the LM, check the lists, tune, apply, score, report, then the rest
ORDER = ("lm", "check", "tune", "apply", "wer", "report", "combine", "demo")
LM_ORDER = ("build", "perplexity", "mix", "convert", "check")

EXAMPLES: dict[tuple[str, ...], str] = {
    (): "rescore lm build train.txt -o domain.lm && rescore tune dev.jsonl --lm domain.lm "
        "-o weights.json",
    ("lm",): "rescore lm build logbook.txt --order 3 -o logbook.lm",
    ("lm", "build"): "rescore lm build logbook.txt --order 4 --memory 4G -o logbook.lm",
    ("lm", "perplexity"): "rescore lm perplexity logbook.lm dev.txt --json",
    ("lm", "mix"): "rescore lm mix background.lm logbook.lm --tune-on dev.txt -o mixed.lm",
    ("lm", "convert"): "rescore lm convert general.arpa.gz general.lm",
    ("lm", "check"): "rescore lm check logbook.lm",
    ("check",): "rescore check dev.jsonl --lm logbook.lm --json",
    ("tune",): "rescore tune dev.jsonl --lm logbook.lm -o weights.json",
    ("apply",): "rescore apply test.jsonl --lm logbook.lm --weights weights.json "
                "-o rescored.jsonl",
    ("wer",): "rescore wer rescored.jsonl --json",
    ("report",): "rescore report --before test.jsonl --after rescored.jsonl "
                 "--weights weights.json -o report/",
    ("combine",): "rescore combine A=system-a.jsonl B=system-b.jsonl -o combined.jsonl",
    ("demo",): "rescore demo --out demo-out",
}


_BY_LABEL = {"path": "FILE", "file": "FILE", "directory": "DIR", "int": "N",
             "int range": "N", "float": "X", "float range": "X", "str": "VALUE"}


def _metavar(param: Any) -> str:
    """A metavar from the type label typer would print (``<int range>`` -> ``N``)."""
    try:
        label = str(param.display_type(None)).strip("<>")
    except Exception:
        return "VALUE"
    if label.startswith("list[") and label.endswith("]"):
        label = label[5:-1]
    return _BY_LABEL.get(label, label if "|" in label else "VALUE")


def _no_type(ctx: Any) -> None:
    return None


def apply_help_style(command: Any, path: tuple[str, ...] = ()) -> None:
    """Metavars, no type labels and the example line, over ``command`` and its children."""
    for param in getattr(command, "params", []):
        if isinstance(param, TyperOption):
            if param.is_flag or param.count:
                param.metavar = ""
            elif param.metavar is None:
                param.metavar = _metavar(param)
        elif isinstance(param, TyperArgument):
            if param.metavar is None:
                param.metavar = (param.name or "value").upper()
            param.display_type_rich = _no_type  # type: ignore[method-assign]
    _quiet_help_option(command)
    example = EXAMPLES.get(path)
    if example is not None and not getattr(command, "epilog", None):
        command.epilog = f"Example: {example}"
    for name, sub in getattr(command, "commands", {}).items():
        apply_help_style(sub, (*path, name))


def _quiet_help_option(command: Any) -> None:
    # the --help option is made when a page is drawn, not kept among the params
    made = command.get_help_option

    def without_type(ctx: Any) -> Any:
        option = made(ctx)
        if option is not None:
            option.metavar = ""
        return option

    command.get_help_option = without_type


def ordered(names: list[str], order: tuple[str, ...]) -> list[str]:
    """``names`` in ``order`` first, any others after them in their own order."""
    return [n for n in order if n in names] + [n for n in names if n not in order]
