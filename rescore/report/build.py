"""The data of a release report: per-utterance pairs in, one frozen :class:`Report` out.

Everything here is plain data computed from two systems' transcripts of the same
utterances; the writers (json, markdown, html) only format it.
"""

from __future__ import annotations

import math
from collections.abc import Mapping, Sequence
from dataclasses import dataclass, field, replace
from typing import Any

import numpy as np

from rescore.counting import PLAIN, Counting
from rescore.errors import InputError
from rescore.lm.overlap import OverlapSummary
from rescore.progress import Report as ProgressReport
from rescore.progress import Steps
from rescore.provenance import header
from rescore.report.breakdown import MIN_GROUP_UTTERANCES, Breakdown, build_breakdown
from rescore.report.critical import ClassResult, CriticalClass, builtin_classes, critical_words
from rescore.report.rows import UtteranceRow
from rescore.significance import (
    BootstrapResult,
    MatchedPairsResult,
    SignTestResult,
    WilcoxonResult,
    matched_pairs,
    paired_bootstrap,
    sign_test,
    wilcoxon_signed_rank,
)
from rescore.tune.results import TuningRecord
from rescore.units import in_unit
from rescore.wer import (
    CerResult,
    WerResult,
    corpus_cer,
    counts_from_alignments,
    summarise,
)

DEFAULT_RESAMPLES = 10_000
DEFAULT_SEED = 0
DEFAULT_CONFIDENCE = 0.95
DEFAULT_MIN_RUN = 2
# common practice, not law: under about a hundred test utterances one utterance moves the
# WER and the tests' verdicts too much to rest a release on
MIN_TEST_UTTERANCES = 100

# carried by every report (a report.json field, and the .md and .html footers) and the README
CAUTION = (
    "A WER measured on one test set guarantees nothing on another: a different speaker, "
    "microphone, room, vocabulary or way of speaking can change it in either direction. "
    "Transcripts that feed medical, legal or safety decisions need validation on the "
    "deployment's own data, under that field's rules and by licensed practitioners, before "
    "anyone relies on them."
)


@dataclass(frozen=True)
class Pair:
    """One utterance of one system: normalised reference and hypothesis words."""

    id: str
    reference: tuple[str, ...]
    hypothesis: tuple[str, ...]
    meta: Mapping[str, Any] = field(default_factory=dict)

    @classmethod
    def from_text(cls, id: str, reference: str, hypothesis: str,
                  meta: Mapping[str, Any] | None = None, counting: Counting = PLAIN) -> Pair:
        """Both sides as ``counting`` scores them (by default :func:`rescore.text.tokens`'s
        words; the rules' tokens, or characters, otherwise)."""
        return cls(id, tuple(counting.score_tokens(reference)),
                   tuple(counting.score_tokens(hypothesis)), dict(meta or {}))


@dataclass(frozen=True)
class Difference:
    """The contract's ``difference`` object: after minus before, with its evidence."""

    absolute: float
    relative: float | None
    ci_low: float
    ci_high: float
    probability_of_improvement: float
    matched_pairs_p: float
    sign_test_p: float
    wilcoxon_p: float

    def to_dict(self) -> dict[str, float | None]:
        return dict(vars(self))


@dataclass(frozen=True)
class Report:
    before: WerResult
    after: WerResult
    before_cer: CerResult
    after_cer: CerResult
    difference: Difference
    bootstrap: BootstrapResult
    matched_pairs: MatchedPairsResult
    sign: SignTestResult
    wilcoxon: WilcoxonResult
    breakdown: Breakdown
    utterances: tuple[UtteranceRow, ...]
    provenance: Mapping[str, Any]
    tuning: TuningRecord | None = None
    gate: Mapping[str, Any] | None = None
    warnings: tuple[str, ...] = ()
    critical: tuple[ClassResult, ...] = ()
    overlap: OverlapSummary | None = None
    confidence: Any = None  # rescore.report.confidence.ConfidenceSummary (word confidences)

    @property
    def joiner(self) -> str:
        """What goes between tokens when a transcript is shown: a space between words,
        nothing between characters (``--unit char``, a script written without spaces)."""
        return "" if self.provenance.get("unit") == "char" else " "

    def to_dict(self) -> dict[str, Any]:
        sep = self.joiner
        out: dict[str, Any] = {
            "before": self.before.to_dict(),
            "after": self.after.to_dict(),
            "difference": self.difference.to_dict(),
            "character": {"before": self.before_cer.to_dict(),
                          "after": self.after_cer.to_dict()},
            "tests": {
                "bootstrap": self.bootstrap.to_dict(),
                "matched_pairs": self.matched_pairs.to_dict(),
                "sign": self.sign.to_dict(),
                "wilcoxon": self.wilcoxon.to_dict(),
            },
            "breakdown": self.breakdown.to_dict(),
            "critical_words": {c.name: c.to_dict() for c in self.critical},
            **({} if self.overlap is None else {"overlap": self.overlap.to_dict()}),
            "utterances": [
                {"id": u.id, "reference_words": u.reference_words,
                 "before_errors": u.before_errors, "after_errors": u.after_errors,
                 "reference": sep.join(u.before.reference),
                 "before": sep.join(u.before.hypothesis),
                 "after": sep.join(u.after.hypothesis)}
                for u in self.utterances
            ],
        }
        if self.tuning is not None:
            out["tuning"] = self.tuning.to_dict()
        if self.gate is not None:
            out["gate"] = dict(self.gate)
        if self.confidence is not None:
            out["confidence"] = self.confidence.to_dict()
        out["warnings"] = list(self.warnings)
        out["provenance"] = dict(self.provenance)
        out["caution"] = CAUTION
        return out


def _match(before: Sequence[Pair], after: Sequence[Pair]) -> list[tuple[Pair, Pair]]:
    """Pair up the two systems by id, in the before system's order."""
    for name, pairs in (("before", before), ("after", after)):
        seen: set[str] = set()
        for p in pairs:
            if p.id in seen:
                raise InputError(f"utterance id {p.id!r} appears twice", field=name)
            seen.add(p.id)
    by_id = {p.id: p for p in after}
    before_ids = {p.id for p in before}
    missing_after = [p.id for p in before if p.id not in by_id]
    missing_before = [p.id for p in after if p.id not in before_ids]
    if missing_after or missing_before:
        parts = []
        if missing_after:
            parts.append(f"missing from after: {_list_ids(missing_after)}")
        if missing_before:
            parts.append(f"missing from before: {_list_ids(missing_before)}")
        raise InputError(f"{len(before)} utterances before, {len(after)} after; "
                         + "; ".join(parts))
    out = []
    for b in before:
        a = by_id[b.id]
        if a.reference != b.reference:
            raise InputError(f"utterance {b.id!r} has different references before and after")
        out.append((b, a))
    if not out:
        raise InputError("no utterances to compare")
    return out


def _list_ids(ids: Sequence[str], limit: int = 10) -> str:
    shown = ", ".join(ids[:limit])
    return shown if len(ids) <= limit else f"{shown} and {len(ids) - limit} more"


def build_report(
    before_pairs: Sequence[Pair],
    after_pairs: Sequence[Pair],
    *,
    provenance: Mapping[str, Any] | None = None,
    tuning: TuningRecord | Mapping[str, Any] | None = None,
    resamples: int = DEFAULT_RESAMPLES,
    seed: int = DEFAULT_SEED,
    confidence: float = DEFAULT_CONFIDENCE,
    min_run: int = DEFAULT_MIN_RUN,
    critical_classes: Sequence[CriticalClass] | None = None,
    overlap: OverlapSummary | None = None,
    progress: ProgressReport | None = None,
    counting: Counting = PLAIN,
) -> Report:
    """Compare two systems on the same utterances: WER, CER, tests and breakdowns.

    ``tuning`` is a :class:`~rescore.tune.results.TuningRecord` or the tuning output as
    parsed JSON (its ``surface`` and ``depth`` are shown when present). ``progress`` (see
    :mod:`rescore.progress`) hears of the bootstrap, resample by resample.
    ``critical_classes`` are the classes of critical words counted apart (default: the
    built-in numbers and negations; see :mod:`rescore.report.critical`). ``overlap`` is the
    test references' overlap with the language models' training text
    (:func:`rescore.lm.overlap.overlap_summary`); above its threshold the report warns first
    of all. ``counting`` is the unit and the scoring rules the pairs were read
    under (:meth:`Pair.from_text`): the alignments follow the rules, and both go into
    the provenance.
    """
    if tuning is not None and not isinstance(tuning, TuningRecord):
        tuning = TuningRecord.from_dict(tuning)
    matched = _match(before_pairs, after_pairs)
    refs = [b.reference for b, _ in matched]
    hyp_b = [b.hypothesis for b, _ in matched]
    hyp_a = [a.hypothesis for _, a in matched]
    al_b = counting.align_many(refs, hyp_b)
    al_a = counting.align_many(refs, hyp_a)
    counts_b = counts_from_alignments(al_b)
    counts_a = counts_from_alignments(al_a)
    wer_b, wer_a = summarise(counts_b), summarise(counts_a)
    boot = paired_bootstrap(counts_b.errors, counts_a.errors, counts_b.reference_words,
                            resamples=resamples, seed=seed, confidence=confidence,
                            progress=Steps(progress, "bootstrap resamples", resamples))
    mp = matched_pairs(al_b, al_a, min_run=min_run)
    diffs = counts_a.errors - counts_b.errors
    sign = sign_test(diffs)
    wil = wilcoxon_signed_rank(diffs)
    absolute = wer_a.wer - wer_b.wer
    difference = Difference(
        absolute=absolute,
        relative=absolute / wer_b.wer if wer_b.wer > 0 and math.isfinite(wer_b.wer) else None,
        ci_low=boot.difference_ci[0],
        ci_high=boot.difference_ci[1],
        probability_of_improvement=boot.probability_of_improvement,
        matched_pairs_p=mp.p_value,
        sign_test_p=sign.p_value,
        wilcoxon_p=wil.p_value,
    )
    rows = tuple(
        UtteranceRow(b.id, len(b.reference), x, y, dict(b.meta) or dict(a.meta))
        for (b, a), x, y in zip(matched, al_b, al_a, strict=True)
    )
    prov: dict[str, Any] = header(counting) | {
        "bootstrap": {"resamples": resamples, "seed": seed, "confidence": confidence,
                      "generator": f"numpy {np.__version__} default_rng (PCG64)"},
        "matched_pairs": {"min_run": min_run},
        "wilcoxon": {"zeros": "dropped", "ties": "mid-ranks", "exact_limit": 50},
    }
    prov.update(provenance or {})
    warnings: list[str] = []
    warnings += [] if overlap is None else overlap.warnings()
    if len(rows) < MIN_TEST_UTTERANCES:
        warnings.append(f"only {len(rows)} test utterances (fewer than {MIN_TEST_UTTERANCES}): "
                        "one utterance moves the WER and the tests' verdicts a lot; treat "
                        "the comparison as a hint, not evidence")
    breakdown = build_breakdown(rows)
    small = sorted(key for key, groups in breakdown.by_meta.items()
                   if any(g.too_small for g in groups))
    if small:
        warnings.append(f"subgroups with fewer than {MIN_GROUP_UTTERANCES} utterances (by "
                        f"{', '.join(small)}) are too small to compare; they are marked")
    return Report(
        before=wer_b, after=wer_a,
        # characters with spaces between words; under --unit char the tokens are
        # characters already, and the CER is the error rate itself
        before_cer=corpus_cer(refs, hyp_b, spaces=counting.unit == "word"),
        after_cer=corpus_cer(refs, hyp_a, spaces=counting.unit == "word"),
        difference=difference, bootstrap=boot, matched_pairs=mp, sign=sign, wilcoxon=wil,
        breakdown=breakdown,
        utterances=rows, provenance=prov, tuning=tuning,
        warnings=tuple(in_unit(w, counting.unit) for w in warnings),
        critical=critical_words(rows, builtin_classes() if critical_classes is None
                                else critical_classes),
        overlap=overlap,
    )


def gate_failures(report: Report, *, max_wer: float | None = None,
                  max_regression: float | None = None) -> list[str]:
    """Why the release gates fail (empty when they pass or none is set)."""
    reasons: list[str] = []
    unit = str(report.provenance.get("unit", "word"))
    # in the report's units: WERs in percent, their change in percentage points
    if max_wer is not None and report.after.wer > max_wer:
        reasons.append(f"after WER {100 * report.after.wer:.2f}% is above --max-wer "
                       f"{100 * max_wer:g}%")
    if max_regression is not None and report.difference.absolute > max_regression:
        reasons.append(f"WER change {100 * report.difference.absolute:+.2f} points is above "
                       f"--max-regression {100 * max_regression:g} points")
    return [in_unit(r, unit) for r in reasons]


def with_gate(report: Report, *, max_wer: float | None, max_regression: float | None) -> Report:
    """The report with its gate settings and verdict recorded (unchanged when none is set)."""
    if max_wer is None and max_regression is None:
        return report
    reasons = gate_failures(report, max_wer=max_wer, max_regression=max_regression)
    gate = {"max_wer": max_wer, "max_regression": max_regression,
            "passed": not reasons, "reasons": reasons}
    return replace(report, gate=gate)
