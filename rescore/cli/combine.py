"""``rescore combine``: several recognizers' N-best files of the same utterances merged into
one N-best file, one feature per system (see :mod:`rescore.decode.combine`)."""

from __future__ import annotations

from pathlib import Path
from typing import Annotated

import typer

from rescore.cli._common import emit_json, guarded, info, take_stdout
from rescore.cli.options import CostsOpt, JsonOpt, LogBaseOpt, NbestOutOpt
from rescore.decode.combine import combine_lists
from rescore.errors import UsageError
from rescore.nbest import Utterance, dumps, iter_nbest
from rescore.outputs import atomic_output, check_outputs


def _system(spec: str) -> tuple[str, Path]:
    """``NAME=FILE``, or ``FILE`` named by its file name without .gz and .jsonl."""
    if "=" in spec and not Path(spec).exists():
        name, _, given = spec.partition("=")
        if not name or not given:
            raise UsageError(f"expected NAME=FILE or FILE, got {spec!r}")
        return name, Path(given)
    path = Path(spec)
    name = path.name.removesuffix(".gz").removesuffix(".jsonl")
    return name, path


@guarded
def combine(
    systems: Annotated[list[str], typer.Argument(
        help="Two or more N-best files of the same utterances, one per recognizer (FILE, "
        "named by its file name, or NAME=FILE).", show_default=False)],
    out: NbestOutOpt,
    partial: Annotated[str, typer.Option(
        "--partial", help="An id that some files lack: refuse (error) or keep (its missing "
        "systems' scores are 0 and missing:SYSTEM is 1).")] = "refuse",
    log_base: LogBaseOpt = None, costs: CostsOpt = None, as_json: JsonOpt = False,
) -> None:
    """Merge several recognizers' lists: acoustic:SYSTEM, FEATURE:SYSTEM and missing:SYSTEM
    on every hypothesis."""
    if partial not in ("refuse", "keep"):
        raise UsageError(f"--partial must be refuse or keep, not {partial!r}")
    if len(systems) < 2:
        raise UsageError("combine needs at least two N-best files")
    named = [_system(s) for s in systems]
    names = [n for n, _ in named]
    if len(set(names)) != len(names):
        raise UsageError(f"two files share a system name ({', '.join(names)}); "
                         "give them as NAME=FILE")
    take_stdout([out], as_json=as_json)
    check_outputs([out], [p for _, p in named])
    read: list[tuple[str, list[Utterance]]] = [
        (name, [utt for _, utt in iter_nbest(path, log_base=log_base, costs=costs)])
        for name, path in named]
    merged = combine_lists(read, partial="keep" if partial == "keep" else "refuse")
    with atomic_output(out) as fh:
        fh.write("".join(dumps(utt) + "\n" for utt in merged.utterances))
    if as_json:
        emit_json({"utterances": len(merged.utterances), "systems": names,
                   "hypotheses": sum(len(u["hypotheses"]) for u in merged.utterances),
                   "partial": [{"id": key, "missing": list(lacking)}
                               for key, lacking in merged.partial], "out": str(out)})
        return
    kept = f", {len(merged.partial)} kept without every system" if merged.partial else ""
    info(f"combined {len(merged.utterances)} utterances from {', '.join(names)}{kept} -> {out}")


def register(app: typer.Typer) -> None:
    app.command()(combine)
