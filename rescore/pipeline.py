"""File-level steps behind the commands: read, score, choose, write, summarise.

Each function streams its N-best input in bounded batches where the step allows it and
returns a small result; none of them prints.
"""

from __future__ import annotations

import contextlib
import functools
import itertools
import json
import logging
from collections import Counter
from collections.abc import Callable, Mapping, Sequence
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

import numpy as np

from rescore import tune as tuning
from rescore.batch import (
    DEFAULT_BATCH,
    WriteCounts,
    batches,
    check_accounting,
    rescore_batch,
    write_scored,
)
from rescore.checksum import sha256_file
from rescore.counting import PLAIN, Counting
from rescore.decode.choice import Rule
from rescore.decode.fit import DecodeFit, fit_decoding, read_dev_texts
from rescore.errors import InputError, ParameterError
from rescore.finite import check_tunable
from rescore.listcheck import ListStats, score_stats, text_stats
from rescore.lm import load_model
from rescore.nbest import (
    DEFAULT_LIMITS,
    ReadLimits,
    Utterance,
    iter_nbest,
    output_text,
    read_convention,
    read_refs,
)
from rescore.outputs import LineCounter, atomic_outputs, write_texts_atomic
from rescore.parallel import apply_sharded
from rescore.progress import Advance, Report, Steps
from rescore.provenance import run_provenance
from rescore.scoring import (
    FeatureMatrix,
    LanguageModel,
    build_matrix,
    lm_column,
    oracle_rows,
)
from rescore.shards import count_lines
from rescore.significance import with_interval, with_intervals
from rescore.weights import (
    ACOUSTIC,
    INSERTION_PENALTY,
    LM,
    LM_WEIGHT,
    WORDS,
    Weights,
    read_weights_models,
    weights_text,
)
from rescore.wer import (
    UNDEFINED_WER,
    WerResult,
    wer_from_totals,
)

log = logging.getLogger(__name__)

TUNE_JSON_KEYS = (LM_WEIGHT, INSERTION_PENALTY, "features", "dev_errors", "dev_wer",
                  "one_best_wer", "oracle_wer", "search")


class NamedModel:
    """A model named on the command line, loaded on first use.

    A parallel run hands workers the path only, so the main process never loads it;
    the file's SHA-256 is computed only when provenance asks for it.
    """

    def __init__(self, name: str, path: Path) -> None:
        if path.is_dir():
            raise InputError("is a folder, expected a model file", path=path)
        if not path.is_file():
            raise InputError("model file not found", path=path)
        self.name = name
        self.path = path

    @functools.cached_property
    def model(self) -> LanguageModel:
        return load_model(self.path)

    @functools.cached_property
    def sha256(self) -> str:
        return sha256_file(self.path)


def load_lms(specs: Sequence[str]) -> dict[str, NamedModel]:
    """Models from ``--lm`` values: ``MODEL`` (the main LM) or ``NAME=MODEL``."""
    out: dict[str, NamedModel] = {}
    for spec in specs:
        name, eq, path = spec.partition("=")
        if not eq:
            name, path = LM, spec
        if not name or not path:
            raise ParameterError(f"{spec!r}: expected MODEL or NAME=MODEL", field="lm")
        if name in out:
            raise ParameterError(f"the name {name!r} is given twice", field="lm")
        out[name] = NamedModel(name, Path(path))
    return out


@dataclass(frozen=True)
class OtherModel:
    """A model given for weights that were tuned with another (``--allow-other-model``)."""

    name: str
    path: str
    sha256: str  # of the model given
    tuned_sha256: str  # the weights file's record

    def describe(self) -> str:
        return (f"the weights were tuned with a model {self.name!r} of SHA-256 "
                f"{self.tuned_sha256}, but {self.path} has SHA-256 {self.sha256}")

    def to_dict(self) -> dict[str, str]:
        return {"name": self.name, "path": self.path, "sha256": self.sha256,
                "tuned_sha256": self.tuned_sha256}


def check_models(weights_path: str | Path, models: Mapping[str, NamedModel], *,
                 allow_other: bool = False) -> tuple[OtherModel, ...]:
    """Compare the models given with those the weights file's provenance records.

    A model whose SHA-256 differs from the record is an :class:`InputError` naming both
    hashes, unless ``allow_other``: then the differences are returned for the caller to
    record. A model the weights do not record (or a weights file without provenance) is
    not compared.
    """
    recorded = read_weights_models(weights_path)
    other = tuple(OtherModel(name, str(m.path), m.sha256, recorded[name])
                  for name, m in models.items()
                  if name in recorded and m.sha256 != recorded[name])
    if other and not allow_other:
        raise InputError(other[0].describe() + "; give the model the weights were tuned with, or "
                         "--allow-other-model", path=weights_path,
                         field=f"provenance.models.{other[0].name}.sha256")
    return other


def _models(models: Mapping[str, NamedModel], counting: Counting = PLAIN
            ) -> dict[str, LanguageModel]:
    out = {name: m.model for name, m in models.items()}
    for name, m in models.items():
        counting.check_model(out[name], path=m.path)
    return out


def check_weighted(weights: Weights, models: Mapping[str, object]) -> list[str]:
    """File features the weights use; an LM weight without a model is an error."""
    features = [k for k, v in weights.features.items() if v != 0.0 and not k.startswith("lm:")]
    needed = {LM} if weights.lm_weight != 0.0 else set()
    needed |= {k[3:] for k, v in weights.features.items() if v != 0.0 and k.startswith("lm:")}
    missing = sorted(needed - set(models))
    if missing:
        raise ParameterError(f"the weights give LM weight to {', '.join(missing)} but no such "
                             "model was given", field="lm")
    return features


@dataclass(frozen=True)
class CheckResult:
    utterances: int
    hypotheses: int
    max_depth: int
    depths: dict[int, int]
    one_best_wer: float | None
    oracle_wer: float | None
    one_best: WerResult | None = None
    lists: ListStats = field(default_factory=ListStats)
    warnings: tuple[str, ...] = ()

    def to_dict(self) -> dict[str, Any]:
        return {"utterances": self.utterances, "hypotheses": self.hypotheses,
                "max_depth": self.max_depth, "one_best_wer": self.one_best_wer,
                "oracle_wer": self.oracle_wer,
                "depths": {str(k): v for k, v in sorted(self.depths.items())},
                "empty_hypotheses": self.lists.empty_hypotheses,
                "duplicate_hypotheses": self.lists.duplicate_hypotheses,
                "lists_out_of_order": self.lists.lists_out_of_order,
                "positive_acoustic": self.lists.positive_acoustic,
                "warnings": list(self.warnings)}


def check_file(path: Path, *, refs: Mapping[str, str] | None = None,
               log_base: float | None = None, costs: bool | None = None,
               batch_size: int = DEFAULT_BATCH, counting: Counting = PLAIN) -> CheckResult:
    depths: Counter[int] = Counter()
    n_utt = n_hyp = 0
    errors_1 = errors_o = words = 0
    stats = ListStats()
    with_refs: bool | None = None
    for batch in batches(iter_nbest(path, refs=refs, log_base=log_base, costs=costs),
                          batch_size):
        if with_refs is None:
            with_refs = "reference" in batch[0][1]
        built = build_matrix(batch, path=str(path), with_errors=with_refs, counting=counting)
        m = built.matrix
        stats += score_stats(m.column(ACOUSTIC), m.offsets) + text_stats(built.tokens,
                                                                         m.offsets)
        depths.update(np.diff(m.offsets).tolist())
        n_utt += m.n_utterances
        n_hyp += m.n_hypotheses
        if with_refs and m.errors is not None and m.ref_words is not None:
            firsts = m.offsets[:-1] + np.array([u.get("best", 0) for _, u in batch])
            errors_1 += int(m.errors[firsts].sum())
            errors_o += int(m.errors[oracle_rows(m)].sum())
            words += int(m.ref_words.sum())
    if n_utt == 0:
        raise InputError("no utterances in the file", path=path)
    if with_refs and words == 0:
        raise InputError(UNDEFINED_WER, path=path)

    def rate(errors: int) -> float | None:
        return errors / words if with_refs and words else None

    return CheckResult(n_utt, n_hyp, max(depths), dict(depths), rate(errors_1), rate(errors_o),
                       lists=stats, warnings=stats.warnings(costs=_read_as_costs(path, costs)))


def _read_as_costs(path: Path, costs: bool | None) -> bool:
    """Whether the file's scores were read as costs (--costs, or its header)."""
    return costs if costs is not None else read_convention(path)[0].scores_are_costs


@dataclass(frozen=True)
class ApplyResult:
    utterances: int
    changed: int
    shards: int = 1  # pieces of the input processed separately (1: one process, in order)
    empty: int = 0  # utterances whose output (chosen text, else the 1-best) has no words
    lists: ListStats = field(default_factory=ListStats)
    warnings: tuple[str, ...] = ()


def apply_file(
    path: Path, out: Path, *, models: Mapping[str, NamedModel], weights: Weights,
    text_path: Path | None = None, refs: Mapping[str, str] | None = None,
    refs_path: Path | None = None, log_base: float | None = None, costs: bool | None = None,
    batch_size: int = DEFAULT_BATCH, workers: int = 1, cluster: str | None = None,
    limits: ReadLimits = DEFAULT_LIMITS, progress: Callable[[int], None] | None = None,
    shard_bytes: int | None = None, counting: Counting = PLAIN,
) -> ApplyResult:
    """Rescore ``path`` into ``out`` (and ``text_path``); both appear only when complete.

    With ``workers > 1`` or a ``cluster`` the file is split into shards processed in
    parallel (see :mod:`rescore.parallel`; ``shard_bytes`` is the least size of a shard);
    the output is the same byte for byte.
    """
    counting.check_choice(weights.choose)
    features = check_weighted(weights, models)
    if workers > 1 or cluster is not None:
        if refs is not None and refs_path is None:
            raise ParameterError("parallel runs take references as a file path",
                                 field="refs_path")
        convention, header_line = read_convention(path, log_base=log_base, costs=costs,
                                                  limits=limits)
        total, counts, stats, shards = apply_sharded(
            path, out, models=[(m.name, str(m.path)) for m in models.values()],
            weights=weights, features=features, text_path=text_path, refs_path=refs_path,
            convention=convention, header_line=header_line, limits=limits,
            batch_size=batch_size, workers=workers, cluster=cluster, progress=progress,
            shard_bytes=shard_bytes, counting=counting)
        return ApplyResult(total, counts.changed, shards, counts.empty, stats,
                           stats.warnings(costs=convention.scores_are_costs))
    if refs_path is not None and refs is None:
        refs = read_refs(refs_path)
    lms = _models(models, counting)
    read = 0
    counts = WriteCounts()
    stats = ListStats()
    outputs = [out] if text_path is None else [out, text_path]
    with atomic_outputs(outputs) as handles:
        # count what reaches the files, not what was handed to the writer
        written = [LineCounter(h) for h in handles]
        tsv = written[1] if text_path is not None else None
        for batch in batches(iter_nbest(path, refs=refs, log_base=log_base, costs=costs,
                                        limits=limits), batch_size):
            scored, batch_stats = rescore_batch(batch, path=str(path), lms=lms,
                                                features=features, weights=weights,
                                                counting=counting)
            stats += batch_stats
            counts += write_scored(scored, written[0], tsv, path=str(path),
                                   lines=[line for line, _ in batch])
            read += len(batch)
            log.info("rescored lines %d-%d (%d utterances so far)", batch[0][0], batch[-1][0],
                     read)
            if progress is not None:
                progress(len(batch))
        if read == 0:
            raise InputError("no utterances in the file", path=path)
        for target, counter in zip(outputs, written, strict=True):
            check_accounting(path, read, counter.lines,
                             f"lines written to {target}, so no output was kept")
    return ApplyResult(read, counts.changed, 1, counts.empty, stats,
                       stats.warnings(costs=_read_as_costs(path, costs)))


def wer_file(path: Path, *, refs: Mapping[str, str] | None = None,
             log_base: float | None = None, costs: bool | None = None,
             batch_size: int = DEFAULT_BATCH, counting: Counting = PLAIN) -> WerResult:
    """Corpus WER of the file's output text (:func:`rescore.nbest.output_text`: the chosen
    text of a choice rule, else the 1-best), counted batch by batch (memory stays flat); CER
    (the same counts, of characters) under ``counting``'s unit ``char``."""
    return _wers(path, [output_text], refs=refs, log_base=log_base, costs=costs,
                 batch_size=batch_size, counting=counting)[0]


def before_after_wer(path: Path, *, batch_size: int = DEFAULT_BATCH,
                     counting: Counting = PLAIN) -> tuple[WerResult, WerResult] | None:
    """WER of a rescored file's first hypotheses (the recognizer's 1-best) and of its output
    text, in one pass; ``None`` when its records carry no references."""
    with contextlib.closing(iter_nbest(path)) as records:  # the file closed at once
        first = next(records, None)
    if first is None or "reference" not in first[1]:
        return None
    before, after = _wers(path, [lambda u: u["hypotheses"][0]["text"], output_text],
                          batch_size=batch_size, counting=counting)
    return before, after


def _wers(path: Path, texts: Sequence[Callable[[Utterance], str]], *,
          refs: Mapping[str, str] | None = None, log_base: float | None = None,
          costs: bool | None = None, batch_size: int = DEFAULT_BATCH,
          counting: Counting = PLAIN) -> list[WerResult]:
    """Corpus WER of each way of taking a text from the records, in one pass, each with
    its bootstrap interval (small integers per utterance are kept for it)."""
    totals = np.zeros((len(texts), 4), dtype=np.int64)  # sub, del, ins, hits per way
    # per utterance, for the intervals: each way's errors, and the reference words
    errors: list[list[np.ndarray]] = [[] for _ in texts]
    words: list[np.ndarray] = []
    n_utt = n_scored = 0
    for batch in batches(iter_nbest(path, refs=refs, log_base=log_base, costs=costs,
                                    require_references=True), batch_size):
        refs_text = [u["reference"] for _, u in batch]
        for k, text in enumerate(texts):
            counts = counting.counts(refs_text, [text(u) for _, u in batch])
            totals[k] += [int(a.sum()) for a in (counts.substitutions, counts.deletions,
                                                 counts.insertions, counts.hits)]
            errors[k].append(counts.errors.astype(np.int32))
        words.append(counts.reference_words.astype(np.int32))
        n_utt += len(batch)
        n_scored += len(counts.substitutions)
    if n_utt == 0:
        raise InputError("no utterances in the file", path=path)
    check_accounting(path, n_utt, n_scored, "scored")
    out = []
    for s, d, i, h in totals.tolist():
        if s + d + h == 0:
            raise InputError(UNDEFINED_WER, path=path)
        out.append(wer_from_totals(s, d, i, h, utterances=n_utt))
    # one bootstrap for every way
    return with_intervals(out, [np.concatenate(e) for e in errors], np.concatenate(words))


def wer_transcripts(refs_path: Path, hyps_path: Path, *,
                    counting: Counting = PLAIN) -> WerResult:
    refs = read_refs(refs_path)
    hyps = read_refs(hyps_path)
    missing = sorted(set(refs) - set(hyps))
    extra = sorted(set(hyps) - set(refs))
    if missing or extra:
        detail = (f"missing ids: {', '.join(missing[:5])}" if missing
                  else f"ids without a reference: {', '.join(extra[:5])}")
        raise InputError(f"{len(refs)} references for {len(hyps)} transcripts; {detail}",
                         path=hyps_path)
    if not refs:
        raise InputError("no references in the file", path=refs_path)
    ids = list(refs)
    if not any(counting.score_tokens(refs[i]) for i in ids):
        raise InputError(UNDEFINED_WER, path=refs_path)
    counts = counting.counts([refs[i] for i in ids], [hyps[i] for i in ids])
    result = with_interval(counts)
    check_accounting(hyps_path, len(ids), result.utterances, "scored")
    return result


@dataclass(frozen=True)
class TuneOutcome:
    result: Any
    provenance: dict[str, Any] = field(default_factory=dict)
    warnings: tuple[str, ...] = ()  # the dev lists' score convention (rescore.listcheck)
    decoding: DecodeFit | None = None  # posterior scale, rule WERs, calibration

    def to_dict(self) -> dict[str, Any]:
        data: dict[str, Any] = self.result.to_dict()
        if self.decoding is not None:
            data = data | {"decoding": self.decoding.to_dict()}
        return data | {"warnings": list(self.warnings)}


def load_matrix(path: Path, *, models: Mapping[str, NamedModel], features: Sequence[str],
                refs: Mapping[str, str] | None = None, log_base: float | None = None,
                costs: bool | None = None, progress: Advance | None = None,
                counting: Counting = PLAIN) -> FeatureMatrix:
    """The whole tuning set as one compact matrix (records are not kept); ``progress`` is
    called with the number of utterances of each batch scored."""
    parts: list[FeatureMatrix] = []
    for batch in batches(iter_nbest(path, refs=refs, log_base=log_base, costs=costs,
                                     require_references=True), DEFAULT_BATCH):
        parts.append(build_matrix(batch, path=str(path), lms=_models(models, counting),
                                  features=features, with_errors=True,
                                  counting=counting).matrix)
        if progress is not None:
            progress(len(batch))
    if not parts:
        raise InputError("no utterances in the file", path=path)
    return concat_matrices(parts)


def concat_matrices(parts: Sequence[FeatureMatrix]) -> FeatureMatrix:
    sizes = np.concatenate([np.diff(p.offsets) for p in parts])
    offsets = np.zeros(len(sizes) + 1, dtype=np.int64)
    np.cumsum(sizes, out=offsets[1:])
    errors = [p.errors for p in parts if p.errors is not None]
    ref_words = [p.ref_words for p in parts if p.ref_words is not None]
    return FeatureMatrix(
        names=parts[0].names,
        values=np.concatenate([p.values for p in parts]),
        offsets=offsets,
        ids=tuple(itertools.chain.from_iterable(p.ids for p in parts)),
        errors=np.concatenate(errors) if len(errors) == len(parts) else None,
        ref_words=np.concatenate(ref_words) if len(ref_words) == len(parts) else None,
    )


def tune_file(
    path: Path, *, models: Mapping[str, NamedModel], search: str | None,
    features: Sequence[str], grid_lm: str | None, grid_penalty: str | None, folds: int,
    seed: int, refs: Mapping[str, str] | None, log_base: float | None, costs: bool | None,
    weights_path: Path, analysis_path: Path | None, cv_warn: float = 0.01,
    progress: Report | None = None, widen: bool = True, bounds: str | None = None,
    choose: Rule | None = None, counting: Counting = PLAIN,
) -> TuneOutcome:
    """Read and score the dev set, tune, write the weights (and the analysis).

    ``widen`` lets the grid search widen its grid (see :func:`rescore.tune.widen_grid`);
    ``bounds`` is ``LM_LOW:LM_HIGH,PEN_LOW:PEN_HIGH``, the exact search's box.
    ``counting`` is the token unit and the scoring rules of the errors (and of the LMs'
    tokens); both go into the provenance when not the default.

    ``progress`` (see :mod:`rescore.progress`) hears of the scoring, utterance by utterance
    (the total is the file's line count), and of the tuning.
    """
    counting.check_choice(choose)
    extra_lms = [lm_column(n) for n in models if n != LM]
    main_lm = LM if LM in models else None
    box = None if bounds is None else tuning.parse_bounds(bounds, main_lm)
    scoring = Steps(progress, "scoring the dev set",
                    None if progress is None else count_lines(path))
    matrix = load_matrix(path, models=models, features=features, refs=refs,
                         log_base=log_base, costs=costs, progress=scoring,
                         counting=counting)
    scoring.finish()
    check_tunable(matrix, [c for c in matrix.names if c != WORDS], path=str(path))
    stats = score_stats(matrix.column(ACOUSTIC), matrix.offsets)
    log.info("tuning matrix: %d utterances, %d hypotheses, columns %s", matrix.n_utterances,
             matrix.n_hypotheses, ", ".join(matrix.names))
    result = tuning.tune(
        matrix, search=search, features=[*extra_lms, *features],
        lm_grid=None if grid_lm is None else tuning.parse_grid(grid_lm),
        penalty_grid=None if grid_penalty is None else tuning.parse_grid(grid_penalty),
        folds=folds, seed=seed, cv_warn=cv_warn, lm_column=main_lm,
        progress=progress, widen=widen, bounds=box,
    )
    # one provenance for the weights file and the analysis file: package version,
    # normalisation, data and model checksums, then how the search ran
    prov = run_provenance(data=[path], models=models, extra=result.search_record(),
                          counting=counting)
    # decoding: posterior scale, calibration (and the rule) fitted with the tuned weights
    decoding = fit_decoding(matrix, result.weights, read_dev_texts(
        path, refs=refs, log_base=log_base, costs=costs), choose)
    prov["decoding"] = decoding.to_dict()
    files = {weights_path: weights_text(weights_path, decoding.apply_to(result.weights), prov)}
    if analysis_path is not None:
        files[analysis_path] = json.dumps(result.to_dict() | {"provenance": prov},
                                          indent=2) + "\n"
    # the weights and their analysis appear together or not at all (a full disk, a kill)
    write_texts_atomic(files)
    return TuneOutcome(result, prov, stats.warnings(costs=_read_as_costs(path, costs)),
                       decoding)
