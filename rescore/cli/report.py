"""``rescore report``: the release report of two systems on the same utterances, and its gate."""

from __future__ import annotations

import math
from pathlib import Path
from typing import Annotated

import typer

from rescore import pipeline
from rescore.cli._common import emit_json, guarded, info, pct, stages, table, warn
from rescore.cli.options import CostsOpt, JsonOpt, LogBaseOpt, RefsOpt, RulesOpt, UnitOpt
from rescore.counting import counting_of
from rescore.errors import GateError, UsageError
from rescore.outputs import check_not_inputs
from rescore.report import FILES, report_files
from rescore.report.wording import CAUTION, interval, p_value, points, share_of_resamples
from rescore.units import unit_name

SystemOpt = Annotated[Path, typer.Option(
    help="N-best file (its 1-best) or 'id<TAB>text' transcript file.", show_default=False)]


WarnOverlapOpt = Annotated[str, typer.Option(
    "--warn-overlap", help="Warn when more than this share of the test references are "
    "sentences of an LM's training text: a percentage (1%) or a fraction (0.01).")]


def gate_rate(text: str | None, option: str) -> float | None:
    """A gate threshold as a fraction: ``5%`` (a percentage, 0 to 100) or ``0.05`` (a
    fraction, 0 to 1); anything else is a usage error that shows both forms."""
    if text is None:
        return None
    raw = text.strip()
    percent = raw.endswith("%")
    try:
        value = float(raw[:-1] if percent else raw)
    except ValueError:
        value = math.nan
    limit = 100.0 if percent else 1.0
    if not (0.0 <= value <= limit):
        raise UsageError(f"{option} {text!r}: expected a percentage from 0% to 100% (5%) or a "
                         "fraction from 0 to 1 (0.05)")
    return value / 100.0 if percent else value


@guarded
def report(
    before: SystemOpt,
    after: SystemOpt,
    out: Annotated[Path, typer.Option("-o", "--out", help="Output folder.",
                                      show_default=False)],
    refs: RefsOpt = None,
    resamples: Annotated[int, typer.Option("--resamples", min=1,
                                           help="Bootstrap resamples.")] = 10_000,
    seed: Annotated[int, typer.Option("--seed", help="Bootstrap seed.")] = 0,
    tuning: Annotated[Path | None, typer.Option(
        "--tuning", help="Tuning output (JSON with an error surface and depth curve).")] = None,
    weights: Annotated[Path | None, typer.Option(
        "--weights", help="Weights file that produced AFTER; its weights and SHA-256 go into "
        "the provenance.")] = None,
    max_wer: Annotated[str | None, typer.Option(
        "--max-wer", help="Gate: fail (exit 3) when the after WER is above this; a percentage "
        "(5%) or a fraction in [0, 1] (0.05).", show_default=False)] = None,
    max_regression: Annotated[str | None, typer.Option(
        "--max-regression",
        help="Gate: fail (exit 3) when after - before WER is above this many points; a "
        "percentage (0.5%) or a fraction in [0, 1] (0.005).", show_default=False)] = None,
    terms: Annotated[Path | None, typer.Option(
        "--terms", help="Critical terms counted apart: one word or phrase a line, or "
        "CLASS<TAB>term (negations<TAB>... extends a built-in class).",
        show_default=False)] = None,
    lm: Annotated[list[Path] | None, typer.Option(
        "--lm", help="Language model whose training text is checked for the test references "
        "(repeatable). Default: the models the --weights file records, where they still are.",
        show_default=False)] = None,
    warn_overlap: WarnOverlapOpt = "1%",
    allow_other_model: Annotated[bool, typer.Option(
        "--allow-other-model", help="With --weights and --lm: go on (with a warning) when a "
        "model's SHA-256 differs from the one the weights were tuned with.")] = False,
    log_base: LogBaseOpt = None,
    costs: CostsOpt = None,
    as_json: JsonOpt = False,
    rules: RulesOpt = None,
    unit: UnitOpt = "word",
) -> None:
    """Release report of BEFORE against AFTER: JSON, Markdown and self-contained HTML."""
    counting = counting_of(rules, unit)
    max_wer_rate = gate_rate(max_wer, "--max-wer")
    max_regression_rate = gate_rate(max_regression, "--max-regression")
    overlap_threshold = gate_rate(warn_overlap, "--warn-overlap")
    check_not_inputs([out / name for name in FILES],
                     [before, after, refs, tuning, weights, terms, *(lm or [])])
    if weights is not None and lm:
        # the models named as apply names them (MODEL, or NAME=MODEL), refused like there
        given = pipeline.load_lms([str(p) for p in lm])
        for other in pipeline.check_models(weights, given, allow_other=allow_other_model):
            info(f"warning: {weights}: {other.describe()} (--allow-other-model)")
    lms = [(str(p), p) for p in lm] if lm else None
    with stages("report") as report_progress:
        made = report_files(before, after, out, refs=refs, tuning=tuning, weights=weights,
                            terms=terms, models=lms, overlap_threshold=overlap_threshold or 0.0,
                            resamples=resamples, seed=seed, max_wer=max_wer_rate,
                            max_regression=max_regression_rate, log_base=log_base,
                            costs=costs, progress=report_progress,
                            counting=counting)
    result = made.report
    data = result.to_dict()
    if as_json:
        emit_json({k: data[k] for k in ("before", "after", "difference", "provenance")}
                  | ({"gate": data["gate"]} if "gate" in data else {}))
    else:
        d = result.difference
        table(None, ["", "before", "after", "change"], [
            (unit_name(counting.unit), pct(result.before.wer), pct(result.after.wer),
             points(d.absolute)),
            ("interval of the change", "", "", interval(d.ci_low, d.ci_high)),
            ("probability of improvement", "", "",
             share_of_resamples(d.probability_of_improvement, result.bootstrap.resamples)),
            ("p (matched pairs / sign / Wilcoxon)", "", "",
             " / ".join(p_value(p) for p in (d.matched_pairs_p, d.sign_test_p, d.wilcoxon_p))),
        ])
    for warning in result.warnings:
        warn(warning)
    warn(CAUTION, label="caution")
    if made.gate_reasons:
        # the one line of a failed gate also says where the report is
        raise GateError("release gate failed: " + "; ".join(made.gate_reasons)
                        + f" (report written to {out})")
    info("wrote " + ", ".join(str(p) for p in made.written))


def register(app: typer.Typer, lm_app: typer.Typer) -> None:
    app.command()(report)
