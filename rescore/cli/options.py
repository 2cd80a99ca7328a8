"""Option declarations shared by several commands, so each reads the same everywhere."""

from __future__ import annotations

from pathlib import Path
from typing import Annotated

import typer

NbestArg = Annotated[Path, typer.Argument(help="N-best file (.jsonl or .jsonl.gz).",
                                          show_default=False)]
RefsOpt = Annotated[Path | None, typer.Option(
    "--refs", help="References as 'id<TAB>text' lines (replace those in the file).")]
LogBaseOpt = Annotated[float | None, typer.Option(
    "--log-base", help="Scores in the file are logarithms to this base (overrides the header).")]
CostsOpt = Annotated[bool | None, typer.Option(
    "--costs/--no-costs", help="Scores in the file are costs, lower is better "
    "(overrides the header).", show_default=False)]
JsonOpt = Annotated[bool, typer.Option("--json", help="Print one JSON object on stdout.")]
WeightsOutOpt = Annotated[Path, typer.Option(
    "-o", "--out", metavar="WEIGHTS", show_default=False,
    help="Weights file to write (JSON: the tuned weights and their provenance, for apply "
    "and report).")]
NbestOutOpt = Annotated[Path, typer.Option(
    "-o", "--out", metavar="NBEST", show_default=False,
    help="N-best file to write (.jsonl, .jsonl.gz compressed; '-' for standard output).")]
BatchOpt = Annotated[int, typer.Option("--batch-size", min=1,
                                       help="Utterances held in memory at once.")]
RulesOpt = Annotated[Path | None, typer.Option(
    "--rules", metavar="FILE", help="Scoring rules (TOML): equivalent spellings, optional "
    "and ignored words, normalisation steps; their name and SHA-256 go into the provenance.",
    show_default=False)]
UnitOpt = Annotated[str, typer.Option(
    "--unit", metavar="word|char", help="Unit of counting and scoring: words, or characters "
    "with spaces dropped (character LMs and CER, for scripts written without spaces).")]
