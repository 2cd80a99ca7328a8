"""A release report from files: read the references and the two systems, the tuning record
and the weights file, check the test references against the models' training text, build,
gate and write. ``rescore report``, the demo and :func:`rescore.release_report` all go
through :func:`report_files`; the callers only say what to show."""

from __future__ import annotations

from collections.abc import Mapping, Sequence
from dataclasses import dataclass, replace
from pathlib import Path
from typing import Any

from rescore.checksum import sha256_file
from rescore.counting import PLAIN, Counting
from rescore.errors import InputError
from rescore.limits import ANALYSIS_FILE_LIMIT
from rescore.lm import NGramModel, load_model
from rescore.lm.overlap import DEFAULT_OVERLAP_WARN, overlap_summary
from rescore.nbest import read_refs
from rescore.progress import Report as ProgressReport
from rescore.provenance import data_hashes, weights_provenance
from rescore.readers import read_json
from rescore.report.build import (
    DEFAULT_RESAMPLES,
    DEFAULT_SEED,
    Report,
    build_report,
    with_gate,
)
from rescore.report.confidence import load_confidences
from rescore.report.critical import CriticalClass, builtin_classes, classes_with_terms, read_terms
from rescore.report.load import load_system
from rescore.report.write import write_report
from rescore.tune.results import TuningRecord


@dataclass(frozen=True)
class ReportFiles:
    """What :func:`report_files` made: the report, the files written, and the gate's
    reasons for failing (empty when it passed or none was set)."""

    report: Report
    written: tuple[Path, ...]
    gate_reasons: tuple[str, ...]


def read_tuning_record(path: str | Path) -> TuningRecord:
    """The tuning record of a ``tune --analysis`` file (the same model tune writes)."""
    return _tuning_record(_json_object(path), path)


def _tuning_record(data: Mapping[str, Any], path: str | Path) -> TuningRecord:
    if "surface" not in data and "depth" not in data:
        raise InputError("not a tuning record: it has neither 'surface' nor 'depth' (write "
                         "one with 'rescore tune --analysis FILE')", path=path)
    return TuningRecord.from_dict(data, path=str(path))


def recorded_models(weights: str | Path) -> list[tuple[str, Path]]:
    """The models a weights file records whose file is still at its recorded path with its
    recorded SHA-256 (the others cannot be checked, so they are left out)."""
    return _recorded_models(_json_object(weights))


def _recorded_models(data: Mapping[str, Any]) -> list[tuple[str, Path]]:
    recorded = data.get("provenance", {})
    models = recorded.get("models", {}) if isinstance(recorded, dict) else {}
    out = []
    for name, entry in (models.items() if isinstance(models, dict) else ()):
        path = Path(str(entry.get("path", ""))) if isinstance(entry, dict) else None
        if path is not None and path.is_file() and sha256_file(path) == entry.get("sha256"):
            out.append((str(name), path))
    return out


def report_files(
    before: str | Path,
    after: str | Path,
    out_dir: str | Path | None,
    *,
    refs: str | Path | Mapping[str, str] | None = None,
    tuning: str | Path | TuningRecord | None = None,
    weights: str | Path | None = None,
    terms: str | Path | None = None,
    models: Sequence[tuple[str, str | Path | NGramModel]] | None = None,
    overlap_threshold: float = DEFAULT_OVERLAP_WARN,
    provenance: Mapping[str, Any] | None = None,
    resamples: int = DEFAULT_RESAMPLES,
    seed: int = DEFAULT_SEED,
    max_wer: float | None = None,
    max_regression: float | None = None,
    log_base: float | None = None,
    costs: bool | None = None,
    progress: ProgressReport | None = None,
    counting: Counting = PLAIN,
) -> ReportFiles:
    """Build the release report of ``before`` against ``after`` and write it to ``out_dir``
    (nothing is written when it is ``None``).

    ``models`` are the language models whose training text is checked for the test
    references (name and file or model); without them, those the ``weights`` file records
    where they still are. ``provenance`` entries go first into the report's provenance,
    then the data files' SHA-256 (unless ``provenance`` gives its own ``data_sha256``), the
    weights file's entry and the checked models' SHA-256. A failed gate does not raise:
    its reasons are returned, the report (with its verdict) is still written.

    ``counting`` is the unit and the scoring rules both systems are scored under; a tuning
    record file or a weights file whose provenance records another is refused (their
    errors and the report's would not compare).
    """
    # each file read once: its provenance checked, then its contents used
    tuning_path = tuning if isinstance(tuning, str | Path) else None
    tuning_data = None if tuning_path is None else _json_object(tuning_path)
    if tuning_data is not None:
        counting.check_record(tuning_data.get("provenance"), "the tuning record's errors",
                              path=tuning_path)
    weights_data = None if weights is None else _json_object(weights)
    if weights_data is not None:
        counting.check_record(weights_data.get("provenance"), "the weights' tuning errors",
                              path=weights)
    ref_map = read_refs(refs) if isinstance(refs, str | Path) else refs
    classes: list[CriticalClass] = (builtin_classes() if terms is None
                                    else classes_with_terms(read_terms(terms)))
    before_pairs = load_system(before, refs=ref_map, log_base=log_base, costs=costs,
                               counting=counting)
    after_pairs = load_system(after, refs=ref_map, log_base=log_base, costs=costs,
                              counting=counting)
    record = (_tuning_record(tuning_data, tuning_path)
              if tuning_data is not None and tuning_path is not None
              else tuning if isinstance(tuning, TuningRecord) else None)
    prov: dict[str, Any] = dict(provenance or {})
    if "data_sha256" not in prov:
        files = [p for p in (before, after, refs, tuning, terms) if isinstance(p, str | Path)]
        prov["data_sha256"] = data_hashes(files)
    if weights is not None:
        prov["weights"] = weights_provenance(weights)
    named = list(models) if models else (
        _recorded_models(weights_data) if weights_data is not None else [])
    overlap = None
    if named:
        loaded = [(name, m if isinstance(m, NGramModel) else load_model(m)) for name, m in named]
        # the references as the models' text was read (the plain normalisation at the
        # run's unit), not as the scoring rules read them
        plain = before_pairs if counting.rules is None else load_system(
            before, refs=ref_map, log_base=log_base, costs=costs,
            counting=Counting(counting.unit))
        overlap = overlap_summary(loaded, [list(p.reference) for p in plain],
                                  threshold=overlap_threshold)
        hashes = {name: sha256_file(m) for name, m in named if not isinstance(m, NGramModel)}
        if hashes:
            prov["overlap_models"] = hashes
    report = build_report(before_pairs, after_pairs, provenance=prov, tuning=record,
                          resamples=resamples, seed=seed, critical_classes=classes,
                          overlap=overlap, progress=progress, counting=counting)
    if counting.unit == "word":
        # word confidences are per space-separated word: a text written without spaces
        # has one "word" per utterance, so under --unit char the section is left out
        report = replace(report, confidence=load_confidences(after, refs=ref_map,
                                                             log_base=log_base, costs=costs))
    report = with_gate(report, max_wer=max_wer, max_regression=max_regression)
    written = () if out_dir is None else tuple(write_report(report, out_dir))
    reasons = () if report.gate is None else tuple(report.gate["reasons"])
    return ReportFiles(report, written, reasons)


def _json_object(path: str | Path) -> dict[str, Any]:
    data = read_json(path, ANALYSIS_FILE_LIMIT)
    if not isinstance(data, dict):
        raise InputError("expected a JSON object", path=path)
    return data
