"""Foundation commands: check, tune, apply, wer and demo."""

from __future__ import annotations

import sys
from collections.abc import Sequence
from pathlib import Path
from typing import Annotated

import typer

from rescore import demo as demo_lib
from rescore import pipeline
from rescore.batch import DEFAULT_BATCH
from rescore.cli import combine
from rescore.cli._common import (
    emit_json,
    guarded,
    info,
    is_standard_output,
    pct,
    progress,
    stages,
    table,
    take_stdout,
    warn,
)
from rescore.cli.decoding import ChooseOpt, decoding_rows, rule_value, with_rule
from rescore.cli.options import (
    BatchOpt,
    CostsOpt,
    JsonOpt,
    LogBaseOpt,
    NbestArg,
    NbestOutOpt,
    RefsOpt,
    RulesOpt,
    UnitOpt,
    WeightsOutOpt,
)
from rescore.cli.report import WarnOverlapOpt, gate_rate
from rescore.counting import counting_of
from rescore.demo_kana import KanaDemoResult, run_kana_demo
from rescore.errors import UsageError
from rescore.lm import load_model
from rescore.lm.overlap import overlap_summary
from rescore.nbest import read_refs
from rescore.outputs import check_outputs
from rescore.report.load import reference_sentences
from rescore.scoring import oov_features
from rescore.shards import count_lines
from rescore.units import characters, in_unit, unit_name
from rescore.weights import INSERTION_PENALTY, LM_WEIGHT, read_weights, read_weights_provenance
from rescore.wer import WerResult


def _refs(path: Path | None) -> dict[str, str] | None:

    return None if path is None else read_refs(path)


def _wer_table(title: str | None, unit: str, rows: list[tuple[str, WerResult]]) -> None:
    """The summary table: reference words, errors, the rate and its bootstrap interval,
    then the substitutions, deletions and insertions the errors are made of; a line on
    stderr says how the interval was drawn."""
    table(title, _columns(unit), [
        [label, r.reference_words, r.errors, pct(r.wer),
         "-" if r.interval is None else f"[{pct(r.interval.low)}, {pct(r.interval.high)}]",
         r.substitutions, r.deletions, r.insertions] for label, r in rows])
    legend = [f"{label}: {ROW_MEANINGS[label]}" for label, _ in rows if label in ROW_MEANINGS]
    if legend:
        info("; ".join(legend))
    drawn = next((r.interval for _, r in rows if r.interval is not None), None)
    if drawn is not None:
        info(f"interval: {100 * drawn.confidence:g}% bootstrap over utterances "
             f"({drawn.resamples:,} resamples, seed {drawn.seed})")


# short row labels keep the table within 80 columns; the line under it says what they are
ROW_MEANINGS = {"before": "the recognizer's 1-best", "after": "rescored",
                "oracle": "the fewest-error hypothesis of each list"}


# reference words, errors, WER and its interval first; then what the errors are made of
# (errors = sub + del + ins)
WER_COLUMNS = ["", "ref words", "errors", "WER", "95% interval", "sub", "del", "ins"]


def _columns(unit: str) -> list[str]:
    """The WER table's columns in the unit's words (CER, ref chars under ``char``)."""
    return [in_unit(c, unit) for c in WER_COLUMNS]


@guarded
def check(nbest: NbestArg, refs: RefsOpt = None, log_base: LogBaseOpt = None,
          costs: CostsOpt = None, as_json: JsonOpt = False,
          batch_size: BatchOpt = DEFAULT_BATCH,
          lm: Annotated[list[Path] | None, typer.Option(
              "--lm", help="Count the references found verbatim in this LM's training text "
              "(repeatable).", show_default=False)] = None,
          warn_overlap: WarnOverlapOpt = "1%", rules: RulesOpt = None,
          unit: UnitOpt = "word") -> None:
    """Validate an N-best file: counts, list depths, 1-best and oracle WER with references."""
    counting = counting_of(rules, unit)
    threshold = gate_rate(warn_overlap, "--warn-overlap") or 0.0
    if lm and str(nbest) == "-":
        raise UsageError("check --lm reads the references a second time: give a file, not -")
    ref_map = _refs(refs)
    result = pipeline.check_file(nbest, refs=ref_map, log_base=log_base, costs=costs,
                                 batch_size=batch_size, counting=counting)
    overlap = None
    if lm:
        loaded = [(str(p), load_model(p)) for p in lm]
        for path, model in loaded:
            counting.check_model(model, path=path)
        sentences = reference_sentences(nbest, refs=ref_map, log_base=log_base, costs=costs)
        if counting.unit == "char":  # a character model holds its sentences' characters
            sentences = [characters(s) for s in sentences]
        overlap = overlap_summary(loaded, sentences, threshold=threshold)
    for line in [] if overlap is None else overlap.warnings():
        warn(line)
    _warn(result.warnings)
    if as_json:
        emit_json(result.to_dict() | ({} if overlap is None else {"overlap": overlap.to_dict()})
                  | counting.provenance())
        return
    rate = unit_name(counting.unit)
    table(f"{nbest}", ["", "value"], [
        ["utterances", result.utterances],
        ["hypotheses", result.hypotheses],
        ["max depth", result.max_depth],
        ["mean depth", result.hypotheses / max(result.utterances, 1)],
        [f"1-best {rate}", pct(result.one_best_wer)],
        [f"oracle {rate}", pct(result.oracle_wer)],
        *([] if overlap is None else [
            ["references in the LM text", f"{overlap.found} of {overlap.references} "
             f"({pct(overlap.share)})"]]),
        ["empty hypotheses", result.lists.empty_hypotheses],
        ["duplicates (after normalisation)", result.lists.duplicate_hypotheses],
        ["lists ordered against their scores", result.lists.lists_out_of_order],
    ])
    table("list depth", ["hypotheses", "utterances"],
          [[d, c] for d, c in sorted(result.depths.items())])


def _readable_output(out: Path) -> bool:
    """Whether an output just written can be read back: a regular file that is not this
    process's standard output under another name (``/dev/stdout`` redirected to a file)."""
    return out.is_file() and not is_standard_output(out)


def cv_gap_rate(text: str) -> float:
    """``--warn-cv-gap`` as a fraction: ``1%`` or ``0.01``, the forms the gates take. Before
    this form the option took bare points (``1.0``); a bare value that large is almost surely
    meant so, and one line says how it is read now."""
    rate = gate_rate(text, "--warn-cv-gap")
    assert rate is not None
    if not text.strip().endswith("%") and rate >= 0.05:
        warn(f"--warn-cv-gap {text} is read as a fraction ({100 * rate:g} points); for "
             f"percentage points write {text.strip()}%")
    return rate


def _warn(warnings: Sequence[str]) -> None:
    for line in warnings:
        info(f"warning: {line}")


@guarded
def apply(
    nbest: NbestArg,
    weights: Annotated[Path, typer.Option("--weights", help="Weights file from 'rescore tune'.",
                                          show_default=False)],
    out: NbestOutOpt,
    lm: Annotated[list[str] | None, typer.Option(
        "--lm", help="Language model (MODEL, or NAME=MODEL for several). Optional when only "
        "file features are weighted.")] = None,
    text: Annotated[Path | None, typer.Option(
        "--text", help="Also write 'id<TAB>output text' lines here (the chosen text under "
        "--choose min-risk or consensus, else the 1-best).")] = None,
    refs: RefsOpt = None, log_base: LogBaseOpt = None, costs: CostsOpt = None,
    batch_size: BatchOpt = DEFAULT_BATCH,
    workers: Annotated[int, typer.Option(
        "--workers", min=1, help="Worker processes on this machine.")] = 1,
    cluster: Annotated[str | None, typer.Option(
        "--cluster", help="Dask scheduler address (tcp://HOST:PORT), or 'local' to start a "
        "local cluster of --workers processes.")] = None,
    shard_mb: Annotated[float, typer.Option(
        "--shard-mb", min=0.001, help="With --workers or --cluster: least size of one shard "
        "of the input, in MiB (the input is cut into at most 4 shards per worker).")] = 1.0,
    allow_other_model: Annotated[bool, typer.Option(
        "--allow-other-model", help="Go on (with a warning) when a model's SHA-256 differs "
        "from the one the weights were tuned with.")] = False,
    choose: ChooseOpt = None,
    no_wer: Annotated[bool, typer.Option(
        "--no-wer", help="Skip the WER before and after: with references, it reads the output "
        "back once (about half again the rescoring time on large files).")] = False,
    as_json: JsonOpt = False,
    unit: UnitOpt = "word",
) -> None:
    """Rescore an N-best file: add lm, word_count and total to each hypothesis and the best
    index; with references, print the WER before and after."""
    counting = counting_of(None, unit)
    take_stdout([out, text], as_json=as_json)
    models = pipeline.load_lms(lm or [])
    check_outputs([out, text], [nbest, weights, refs, *(m.path for m in models.values())])
    w = with_rule(read_weights(weights), choose)
    # weights tuned at one unit weigh the tokens of that unit: refuse the other
    counting.check_record(read_weights_provenance(weights), "the weights", path=weights,
                          rules=False)
    for other in pipeline.check_models(weights, models, allow_other=allow_other_model):
        info(f"warning: {weights}: {other.describe()} (--allow-other-model)")
    with progress("rescoring", count_lines(nbest) if sys.stdout.isatty() else None) as step:
        result = pipeline.apply_file(nbest, out, models=models, weights=w, text_path=text,
                                     refs_path=refs, log_base=log_base, costs=costs,
                                     batch_size=batch_size, workers=workers, cluster=cluster,
                                     progress=step, shard_bytes=round(shard_mb * (1 << 20)),
                                     counting=counting)
    _warn(result.warnings)
    # with references, the WER of the recognizer's 1-best and of the output, read back from
    # the output just written: only from a regular file that is not standard output (not
    # from -, a FIFO, a terminal or /proc/self/fd/1)
    wers = (pipeline.before_after_wer(out, batch_size=batch_size, counting=counting)
            if not no_wer and _readable_output(out) else None)
    if as_json:
        emit_json({"utterances": result.utterances, "changed": result.changed,
                   "empty": result.empty, "shards": result.shards, "out": str(out),
                   "before": None if wers is None else wers[0].to_dict(),
                   "after": None if wers is None else wers[1].to_dict()})
    elif wers is not None:
        _wer_table(f"{out}: {unit_name(counting.unit)} before and after", counting.unit,
                   [("before", wers[0]), ("after", wers[1])])
    shards = f" in {result.shards} shards" if result.shards > 1 else ""
    info(f"rescored {result.utterances} utterances{shards} ({result.changed} changed 1-best, "
         f"{result.empty} chose an empty hypothesis) -> {out}")


@guarded
def wer(
    nbest: Annotated[Path | None, typer.Argument(help="N-best file (its 1-best is scored).",
                                                 show_default=False)] = None,
    refs: RefsOpt = None,
    hyps: Annotated[Path | None, typer.Option(
        "--hyps", help="Transcripts as 'id<TAB>text' lines (with --refs).")] = None,
    log_base: LogBaseOpt = None, costs: CostsOpt = None, as_json: JsonOpt = False,
    batch_size: BatchOpt = DEFAULT_BATCH, rules: RulesOpt = None, unit: UnitOpt = "word",
) -> None:
    """Word error rate of an N-best file's 1-best, or of a transcript file against --refs
    (character error rate with --unit char)."""
    counting = counting_of(rules, unit)
    if (nbest is None) == (hyps is None):
        raise UsageError("give either an N-best file or --refs FILE --hyps FILE")
    if hyps is not None:
        if refs is None:
            raise UsageError("--hyps needs --refs")
        result = pipeline.wer_transcripts(refs, hyps, counting=counting)
    else:
        assert nbest is not None
        result = pipeline.wer_file(nbest, refs=_refs(refs), log_base=log_base, costs=costs,
                                   batch_size=batch_size, counting=counting)
    if as_json:
        # the contract's keys (a CER under --unit char: counts of characters), then how
        # they were counted when not the default
        emit_json(result.to_dict() | counting.provenance())
        return
    label = "transcripts" if hyps is not None else "1-best"
    _wer_table(None, counting.unit, [(label, result)])


@guarded
def tune(
    nbest: NbestArg,
    out: WeightsOutOpt,
    lm: Annotated[list[str] | None, typer.Option(
        "--lm", help="Language model (MODEL, or NAME=MODEL for several).")] = None,
    search: Annotated[str | None, typer.Option(
        "--search", help="grid or exact (default: grid for two weights, exact for more).")] = None,
    feature: Annotated[list[str] | None, typer.Option(
        "--feature", help="Also tune the weight of this N-best feature (repeatable).")] = None,
    grid_lm: Annotated[str | None, typer.Option(
        "--grid-lm", help="LM weight grid LOW:HIGH:N, N points from LOW to HIGH "
        "(default 0:30:121).")] = None,
    grid_penalty: Annotated[str | None, typer.Option(
        "--grid-penalty", help="Insertion penalty grid LOW:HIGH:N (default -20:20:81).")] = None,
    folds: Annotated[int, typer.Option("--folds", min=0,
                                       help="Cross-validation folds (0 or 1: none).")] = 5,
    seed: Annotated[int, typer.Option("--seed", help="Seed of restarts and folds.")] = 0,
    warn_cv_gap: Annotated[str, typer.Option(
        "--warn-cv-gap", metavar="RATE",
        help="Warn when the cross-validated WER and the dev WER differ by more than this: "
        "percentage points (1%) or a fraction (0.01), as the report's gates take them.")
    ] = "1%",
    analysis: Annotated[Path | None, typer.Option(
        "--analysis", help="Write the error surface, depth curve and cross-validation "
        "here (JSON, for 'rescore report --tuning').")] = None,
    no_widen: Annotated[bool, typer.Option(
        "--no-widen", help="Keep the grid fixed even when its fewest-errors region touches "
        "its edge (warn instead of widening it).")] = False,
    bounds: Annotated[str | None, typer.Option(
        "--bounds", metavar="LM_LOW:LM_HIGH,PEN_LOW:PEN_HIGH",
        help="The exact search's box for LM weight and insertion penalty, which also "
        "limits grid widening (default 0:100,-100:100).")] = None,
    oov_feature: Annotated[bool, typer.Option(
        "--oov-feature", help="Also tune a weight for each LM's count of words outside its "
        "vocabulary (oov_count, oov_count:NAME); apply then counts them too.")] = False,
    refs: RefsOpt = None, log_base: LogBaseOpt = None, costs: CostsOpt = None,
    choose: ChooseOpt = None,
    as_json: JsonOpt = False,
    rules: RulesOpt = None,
    unit: UnitOpt = "word",
) -> None:
    """Tune LM weight and insertion penalty (and feature weights) on a dev set."""
    counting = counting_of(rules, unit)
    models = pipeline.load_lms(lm or [])
    if oov_feature:
        if not models:
            raise UsageError("--oov-feature counts words outside an LM's vocabulary; give --lm")
        feature = list(dict.fromkeys([*(feature or []), *oov_features(list(models))]))
    take_stdout([out, analysis], as_json=as_json)
    check_outputs([out, analysis], [nbest, refs, *(m.path for m in models.values())])
    with stages(f"tune {nbest.name}") as report:
        outcome = pipeline.tune_file(
            nbest, models=models, search=search, features=feature or [], grid_lm=grid_lm,
            grid_penalty=grid_penalty, folds=folds, seed=seed, refs=_refs(refs),
            log_base=log_base, costs=costs, weights_path=out, analysis_path=analysis,
            cv_warn=cv_gap_rate(warn_cv_gap),
            progress=report, widen=not no_widen, bounds=bounds,
            choose=None if choose is None else rule_value(choose), counting=counting,
        )
    data = outcome.to_dict()
    _warn(outcome.warnings)
    for widening in outcome.result.widenings:
        info(widening.describe())
    if as_json:
        emit_json({k: data[k] for k in pipeline.TUNE_JSON_KEYS if k in data} | {
            k: data.get(k) for k in ("cv_wer", "cv_gap", "cv_warning", "edge_warning",
                                     "widenings", "warnings")} | counting.provenance())
    else:
        gap = data.get("cv_gap")
        rate = unit_name(counting.unit)
        table(f"tuned on {nbest} ({data['search']} search)", ["", "value"], [
            ["LM weight", data[LM_WEIGHT]],
            ["insertion penalty", data[INSERTION_PENALTY]],
            *[[f"feature {k}", v] for k, v in data["features"].items()],
            [f"1-best {rate}", pct(data["one_best_wer"])],
            [f"dev {rate} (tuned)", pct(data["dev_wer"])],
            [f"cross-validated {rate}", pct(data.get("cv_wer"))],
            ["cross-validated - dev", "-" if gap is None else f"{100 * gap:+.2f} points"],
            [f"oracle {rate}", pct(data["oracle_wer"])],
            *decoding_rows(outcome.decoding),
        ])
    for key in ("cv_warning", "edge_warning"):
        if data.get(key):
            info(f"warning: {data[key]}")
    info(f"weights -> {out}")


@guarded
def demo(
    out: Annotated[Path, typer.Option("-o", "--out", help="Folder for every output of the demo.")]
    = Path("demo-out"),
    data: Annotated[Path | None, typer.Option(
        "--data", metavar="DIR",
        help="Scenario data folder (default: the bundled scenario).")] = None,
    as_json: JsonOpt = False,
    scenario: Annotated[str, typer.Option(
        "--scenario", metavar="larkspur|kana",
        help="larkspur: the English logbook, in words; kana: the Midoridani mushroom "
        "cellar's Japanese log, written without spaces, in characters (CER).")] = "larkspur",
) -> None:
    """The whole job on a bundled scenario (the Larkspur Growhouse logbook by default):
    build, tune, rescore, report."""
    if scenario not in ("larkspur", "kana"):
        raise UsageError(f"unknown scenario {scenario!r}; expected larkspur or kana",
                         field="--scenario")
    if scenario == "kana":
        _kana_demo(out, data, as_json)
        return
    result = demo_lib.run_demo(out, data_dir=data, progress=info)
    if as_json:
        emit_json(result.summary)
        return
    heading = "Larkspur Growhouse" if data is None else str(data)
    _demo_figures(f"{heading} test set: before and after rescoring", "word", result)
    if result.comparison:
        table("language models compared (perplexity on dev.txt, WER on the test set)",
              ["system", "dev ppl, shared", "dev ppl, own",
               "own OOV", "test WER", "LM weights"],
              [[r["system"], r.get("dev_perplexity_shared"), r.get("dev_perplexity_own"),
                r.get("dev_oov_own"), pct(r["test_wer"]),
                ", ".join([f"lm {r['lm_weight']:.3g}",
                           *(f"{k} {v:.3g}" for k, v in r["features"].items())])]
               for r in result.comparison])
        if result.comparison_vocabulary is not None:
            info(result.comparison_vocabulary.footnote("dev.txt"))
        mixed = next((r for r in result.comparison if "mixture_weights" in r), None)
        if mixed is not None:
            info("mixture weights (EM on dev.txt): " + ", ".join(
                f"{k} {v:.4f}" for k, v in mixed["mixture_weights"].items()))
    info(f"outputs in {out}/ (summary.json, models, weights, rescored files, report)")


def _demo_figures(title: str, unit: str, result: demo_lib.DemoResult | KanaDemoResult
                  ) -> None:
    """A demo's summary table and its tuned weights, in the rate of ``unit``."""
    _wer_table(title, unit, [("before", result.before), ("after", result.after),
                             ("oracle", result.oracle)])
    s = result.summary
    rate = unit_name(unit)
    info(f"LM weight {s['lm_weight']:.3f}, insertion penalty {s['insertion_penalty']:.3f}; "
         f"{rate} {pct(result.before.wer)} -> {pct(result.after.wer)} on {s['utterances']} "
         "utterances")


def _kana_demo(out: Path, data: Path | None, as_json: bool) -> None:
    result = run_kana_demo(out, data_dir=data, progress=info)
    if as_json:
        emit_json(result.summary)
        return
    heading = "Midoridani mushroom cellar" if data is None else str(data)
    _demo_figures(f"{heading} test set: before and after rescoring, in characters", "char",
                  result)
    info(f"outputs in {out}/ (summary.json, character model, weights, rescored file, report)")


def register(app: typer.Typer, lm_app: typer.Typer) -> None:
    app.command()(check)
    app.command()(tune)
    app.command()(apply)
    app.command()(wer)
    app.command()(demo)
    combine.register(app)
