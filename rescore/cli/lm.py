"""``rescore lm build | perplexity | mix | convert``: one small function per verb."""

from __future__ import annotations

from pathlib import Path
from typing import Annotated, Any

import typer

from rescore.cli._common import (
    bars_shown,
    emit_json,
    guarded,
    info,
    pct,
    stages,
    table,
    take_stdout,
)
from rescore.cli.options import UnitOpt
from rescore.errors import UsageError
from rescore.lm import (
    NGramModel,
    is_arpa_name,
    load_model,
    perplexity,
    read_corpus,
    save_model,
    store,
    write_sentence_scores,
)
from rescore.lm.corpus import char_sentences
from rescore.lm.external import MIN_MEMORY, default_memory, parse_size
from rescore.lm.mix import mix_models
from rescore.outputs import check_outputs
from rescore.progress import Steps
from rescore.readers import iter_text_lines
from rescore.shards import count_lines
from rescore.text import tokens
from rescore.units import characters, check_model_unit, parse_unit, unit_provenance


def _cutoffs(text: str | None) -> list[int] | None:
    if text is None:
        return None
    try:
        return [int(part) for part in text.split(",")]
    except ValueError:
        raise UsageError(
            "--min-ngram-counts must be comma-separated whole numbers, one per order from 2, "
            f"got {text!r}"
        ) from None


def _memory_size(text: str) -> int:
    try:
        size = parse_size(text)
    except UsageError as exc:
        exc.field = "--memory"
        raise
    if size < MIN_MEMORY:
        raise UsageError(f"at least {MIN_MEMORY >> 10}K is needed, got {text!r}",
                         field="--memory")
    return size


def _lines(paths: list[Path]) -> int | None:
    """Lines in all the files (None when one is compressed or unreadable)."""
    counts = [count_lines(p) for p in paths]
    return None if any(c is None for c in counts) else sum(c or 0 for c in counts)


def _vocab_words(path: Path | None, unit: str = "word") -> list[str] | None:
    if path is None:
        return None
    words = [w for _, line in iter_text_lines(path) for w in tokens(line)]
    return list(dict.fromkeys(characters(words))) if unit == "char" else words


_Text = Annotated[list[Path], typer.Argument(
    metavar="CORPUS", help="Training text: one sentence a line (.gz ok).")]
_Out = Annotated[Path, typer.Option(
    "--out", "-o", metavar="MODEL", help="Model file (.arpa/.arpa.gz: ARPA).")]
_Order = Annotated[int, typer.Option("--order", "-n", help="n-gram order, 1 to 6.")]
_Method = Annotated[str, typer.Option("--method", "-m", help="mkn, kn, wb, abs, addk or mle.")]
_Vocab = Annotated[Path | None, typer.Option(
    "--vocabulary", metavar="FILE",
    help="Vocabulary file: the words to keep, one a line (default: every word seen).")]
_MaxVocab = Annotated[int | None, typer.Option(
    "--max-vocab", metavar="K", help="Keep the K most frequent words (default: no cap).")]
_MinCount = Annotated[int, typer.Option("--min-count", help="Keep words seen at least C times.")]
_Closed = Annotated[bool, typer.Option(
    "--no-unknown-word", help="Leave unknown words out (no <unk> in the model).")]
_K = Annotated[float, typer.Option("--k", help="The constant of addk smoothing.")]
_Cutoffs = Annotated[str | None, typer.Option(
    "--min-ngram-counts", metavar="N,N,...",
    help="Least count of an n-gram to keep it, per order from 2 (default: 1 for every order, "
    "nothing cut).")]
_Prune = Annotated[float | None, typer.Option(
    "--prune-entropy", metavar="X",
    help="Drop n-grams whose removal changes the model's relative entropy by less than X, "
    "e.g. 1e-8 (default: no pruning).")]
_Memory = Annotated[str | None, typer.Option(
    "--memory", metavar="SIZE",
    help="Memory for counting, e.g. 4G or 500M; a larger text is counted in sorted runs on "
         "disk and merged (same model). Default: half the memory available at the start.")]
_Cluster = Annotated[str | None, typer.Option(
    "--cluster", metavar="ADDRESS|local",
    help="Count shards of the text on a Dask cluster: a scheduler address (tcp://HOST:PORT; "
         "every worker must see the text files under the same paths), or 'local' for a "
         "cluster of --workers processes on this machine. Same model as a local build.")]
_Workers = Annotated[int | None, typer.Option(
    "--workers", min=1, help="With --cluster local: worker processes (default: one per core).")]
_Scratch = Annotated[Path | None, typer.Option(
    "--scratch", metavar="DIR", help="Folder for the sorted runs (default: the system's "
    "temporary folder); removed when the build ends.")]
_Quantize = Annotated[int | None, typer.Option(
    "--quantize", metavar="BITS",
    help="Store probabilities and weights as 8- or 16-bit codes (lossy, smaller).")]


def _check_bits(bits: int | None) -> None:
    if bits is not None and bits not in (8, 16):
        raise UsageError(f"--quantize takes 8 or 16 bits, got {bits}")


@guarded
def build(
    text: _Text,
    output: _Out,
    order: _Order = 3,
    method: _Method = "mkn",
    vocab: _Vocab = None,
    max_vocab: _MaxVocab = None,
    min_count: _MinCount = 1,
    closed_vocab: _Closed = False,
    k: _K = 1.0,
    cutoffs: _Cutoffs = None,
    prune: _Prune = None,
    memory: _Memory = None,
    scratch: _Scratch = None,
    cluster: _Cluster = None,
    workers: _Workers = None,
    quantize: _Quantize = None,
    unit: UnitOpt = "word",
    as_json: Annotated[bool, typer.Option("--json", help="Print one JSON object.")] = False,
) -> None:
    """Train an n-gram language model (on characters with --unit char)."""
    token_unit = parse_unit(unit)
    if token_unit == "char" and cluster is not None:
        raise UsageError("--cluster counts words; build a character model without it",
                         field="--unit")
    _check_bits(quantize)
    take_stdout([output], as_json=as_json)
    check_outputs([output], [*text, vocab])
    budget = default_memory() if memory is None else _memory_size(memory)
    model = NGramModel(
        order, method, k=k, vocab=_vocab_words(vocab, token_unit), max_vocab=max_vocab,
        min_count=min_count, closed_vocab=closed_vocab, cutoffs=_cutoffs(cutoffs), prune=prune,
    )
    lines = _lines(text) if bars_shown() and cluster is None else None
    if workers is not None and cluster != "local":
        raise UsageError("--workers goes with --cluster local", field="--workers")
    with stages(f"lm build ({len(text)} file{'s' if len(text) > 1 else ''})") as report:
        if cluster is not None:
            model.fit_on_cluster(text, cluster, memory=budget, scratch=scratch,
                                 workers=workers, progress=report)
        else:
            corpus = read_corpus(text, progress=Steps(report, "reading text", lines))
            model.fit(corpus if token_unit == "word" else char_sentences(corpus),
                      progress=report, memory=budget, scratch=scratch)
    model.mark_unit(token_unit)
    if quantize is not None:
        model.quantize(quantize)
    save_model(model, output)
    if as_json:
        emit_json(_model_summary(model, output)
                  | {"fallbacks": dict(model.metadata_.get("fallbacks", {}))})
        return
    counts = ", ".join(f"{n} {i + 1}-grams" for i, n in enumerate(model.n_ngrams_))
    info(f"wrote {output}: {model.method} order {model.order_}, "
         f"{len(model.vocab_)} tokens in the vocabulary; {counts}")
    for level, why in model.metadata_.get("fallbacks", {}).items():
        info(f"order {level}: {why}")


def _model_summary(model: NGramModel, path: Path) -> dict[str, Any]:
    """What ``--json`` says of a model written to ``path``: lm check's keys where they mean
    the same (order, ngrams, bytes, bytes_per_ngram), and its method and vocabulary."""
    counts = [int(n) for n in model.n_ngrams_]
    size = None if str(path) == "-" else path.stat().st_size
    return {"out": str(path), "method": model.method, "order": model.order_,
            "vocabulary": len(model.vocab_), "ngrams": counts, "bytes": size,
            "bytes_per_ngram": None if size is None else size / max(sum(counts), 1),
            "quantized_bits": model.metadata_.get("quantized_bits")}


@guarded
def perplexity_cmd(
    model_path: Annotated[Path, typer.Argument(metavar="MODEL", help="Native or ARPA model.")],
    text: Annotated[Path, typer.Argument(
        metavar="CORPUS", help="Text to evaluate: one sentence a line.")],
    as_json: Annotated[bool, typer.Option("--json", help="Print one JSON object.")] = False,
    scores_out: Annotated[Path | None, typer.Option(
        "--per-sentence", metavar="FILE",
        help="Also write one JSON line per sentence: line, text, words, tokens, oov, "
             "log10_prob.")] = None,
    unit: UnitOpt = "word",
) -> None:
    """Perplexity, log10 probability, token and OOV counts of a text (per character with
    --unit char)."""
    token_unit = parse_unit(unit)
    model = load_model(model_path)
    check_model_unit(model, token_unit, path=model_path)
    if scores_out is None:
        corpus = read_corpus(text)
        result = perplexity(model, corpus if token_unit == "word" else char_sentences(corpus))
    else:
        result = write_sentence_scores(model, text, scores_out, unit=token_unit)
        info(f"wrote {scores_out}: {result.sentences} sentences")
    if as_json:
        emit_json(result.to_dict() | unit_provenance(token_unit))
        return
    table(None, ["measure", "value"], [
        ("perplexity", result.perplexity),
        ("log10 probability", result.log10_prob),
        ("sentences", result.sentences),
        ("tokens", result.tokens),
        ("out-of-vocabulary words", result.oov),
        ("OOV rate", pct(result.oov_rate)),
    ])


@guarded
def convert(
    source: Annotated[Path, typer.Argument(
        metavar="IN", help="Model to read (.arpa/.arpa.gz or '-' for ARPA text on stdin).")],
    target: Annotated[Path | None, typer.Argument(
        metavar="OUT", help="Model to write (by file ending; '-' for ARPA text on stdout); "
        "or give it with -o.", show_default=False)] = None,
    out: Annotated[Path | None, typer.Option(
        "--out", "-o", metavar="MODEL", help="Model to write, as OUT.",
        show_default=False)] = None,
    verify: Annotated[bool, typer.Option(
        "--verify", help="Check every value of a native input first (as lm check).")] = False,
    quantize: _Quantize = None,
    as_json: Annotated[bool, typer.Option("--json", help="Print one JSON object.")] = False,
) -> None:
    """Convert a model between ARPA text and the native file."""
    if (target is None) == (out is None):
        raise UsageError("give the model to write once: as OUT or with -o/--out")
    written = target if target is not None else out
    assert written is not None
    take_stdout([written], as_json=as_json)
    _check_bits(quantize)
    check_outputs([written], [source])
    model = load_model(source, verify=verify)
    if quantize is not None:
        model.quantize(quantize)
    save_model(model, written)
    if as_json:
        emit_json({"in": str(source), **_model_summary(model, written)})
        return
    info(f"wrote {written}")


@guarded
def check_cmd(
    model_path: Annotated[Path, typer.Argument(metavar="MODEL", help="Native or ARPA model.")],
    as_json: Annotated[bool, typer.Option("--json", help="Print one JSON object.")] = False,
) -> None:
    """Check a model file completely: structure, sizes, every probability and weight."""
    if is_arpa_name(model_path) or str(model_path) == "-":
        model = load_model(model_path)
        tables, version, size, sha = model.tables_, None, None, None
    else:
        got = store.load_file(model_path, verify=True)
        tables, version, size, sha = got.tables, got.version, got.size, got.sha256
    counts = tables.n_ngrams()
    result = {"ok": True, "format_version": version, "order": tables.order,
              "ngrams": counts, "bytes": size,
              "bytes_per_ngram": None if size is None else size / max(sum(counts), 1),
              "sha256": sha}
    if as_json:
        emit_json(result)
        return
    table(None, ["measure", "value"], [
        ("checked", "every array and value: no problem found"),
        ("format version", "ARPA text" if version is None else version),
        ("order", tables.order),
        *((f"{k}-grams", n) for k, n in enumerate(counts, start=1)),
        *(() if size is None else (("bytes per n-gram", f"{size / max(sum(counts), 1):.2f}"),)),
    ])


def _weights(text: str | None) -> list[float] | None:
    if text is None:
        return None
    try:
        return [float(part) for part in text.split(",")]
    except ValueError:
        raise UsageError(f"--weights must be comma-separated numbers, got {text!r}",
                         field="--fixed-weights") from None


@guarded
def mix(
    models: Annotated[list[Path], typer.Argument(
        metavar="MODEL MODEL...", help="Models to interpolate (native or ARPA).")],
    output: Annotated[Path, typer.Option(
        "--out", "-o", metavar="MODEL", help="The merged back-off model (.arpa/.arpa.gz: ARPA).")],
    tune_on: Annotated[Path | None, typer.Option(
        "--tune-on", help="Held-out in-domain text: the weights maximise its likelihood.")]
    = None,
    weights: Annotated[str | None, typer.Option(
        "--fixed-weights", metavar="W,W,...",
        help="Fixed weights in the models' order, e.g. 0.7,0.3 (no EM).")] = None,
    as_json: Annotated[bool, typer.Option("--json", help="Print one JSON object.")] = False,
) -> None:
    """Interpolate language models; weights by EM on in-domain text; write one merged model."""
    if len(models) < 2:
        raise UsageError("lm mix needs at least two models")
    take_stdout([output], as_json=as_json)
    check_outputs([output], [*models, tune_on])
    if tune_on is None and weights is None:
        raise UsageError("give --tune-on TEXT (to estimate weights) or --weights",
                         field="--tune-on")
    loaded = [load_model(p) for p in models]
    for path, model in zip(models, loaded, strict=True):
        check_model_unit(model, "word", path=path)  # the mixture's text is read as words
    text = None if tune_on is None else list(read_corpus(tune_on))
    _, merged, result = mix_models(loaded, text, weights=_weights(weights))
    save_model(merged, output)
    if as_json:
        emit_json(result.to_dict())
        return
    rows: list[tuple[object, ...]] = []
    comp, like = result.component_perplexities, result.like
    for i, p in enumerate(models):
        rows.append((str(p), result.weights[i], "" if comp is None else comp[i],
                     *(() if like is None else (like.own[i].perplexity, like.own[i].oov))))
    blank = () if like is None else ("", "")
    rows.append(("mixture (exact)", "", "" if result.perplexity is None else result.perplexity,
                 *blank))
    rows.append(("merged model", "",
                 "" if result.merged_perplexity is None else result.merged_perplexity, *blank))
    table(None if tune_on is None else f"perplexity on {tune_on}",
          ["model", "weight", "perplexity" if like is None else "shared-vocabulary perplexity",
           *(() if like is None else ("own-vocabulary perplexity", "own OOV"))], rows)
    if like is not None:
        info(like.vocabulary.footnote(str(tune_on)))
    info(f"wrote {output}: merged back-off model, {len(merged.vocab_)} tokens in the "
         f"vocabulary; " + ", ".join(f"{n} {i + 1}-grams" for i, n in enumerate(merged.n_ngrams_)))


def register(app: typer.Typer, lm_app: typer.Typer) -> None:
    lm_app.command("build")(build)
    lm_app.command("perplexity")(perplexity_cmd)
    lm_app.command("mix")(mix)
    lm_app.command("convert")(convert)
    lm_app.command("check")(check_cmd)
