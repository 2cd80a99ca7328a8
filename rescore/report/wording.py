"""Wording and number formats shared by the Markdown and HTML writers."""

from __future__ import annotations

import json
import math
from typing import Any

from rescore.report.breakdown import MIN_GROUP_UTTERANCES, GroupRow
from rescore.report.build import CAUTION as CAUTION  # the writers' footer text
from rescore.report.build import Report
from rescore.units import in_unit
from rescore.weights import ACOUSTIC_SCALE, INSERTION_PENALTY, LM_WEIGHT

TITLE = "Release report: WER before and after rescoring"

def unit_of(report: Report) -> str:
    """The unit the report counts (its provenance's ``unit``; absent: words)."""
    return str(report.provenance.get("unit", "word"))


def say(report: Report, text: str) -> str:
    """``text`` in the report's unit: unchanged for words; CER for WER, characters for
    words, under ``--unit char``."""
    return in_unit(text, unit_of(report))


def title(report: Report) -> str:
    return say(report, TITLE)


def counting_text(report: Report) -> str:
    """The header's note of the unit and the scoring rules ("" for words and no rules)."""
    parts = []
    if unit_of(report) == "char":
        parts.append("unit: characters, spaces dropped (CER)")
    rules = report.provenance.get("rules")
    if isinstance(rules, dict):
        parts.append(f"scoring rules {rules.get('name')} (SHA-256 {rules.get('sha256')})")
    return "; ".join(parts)


def pct(value: float | None, digits: int = 2) -> str:
    return "-" if value is None else f"{100 * value:.{digits}f}%"


def signed_pct(value: float | None, digits: int = 2) -> str:
    return "-" if value is None else f"{100 * value:+.{digits}f}%"


def p_value(value: float) -> str:
    return "< 0.0001" if value < 1e-4 else f"{value:.4f}"


def points(value: float | None, digits: int = 2) -> str:
    """A difference of two rates in percentage points: ``-12.40 points``."""
    return "-" if value is None else f"{100 * value:+.{digits}f} points"


def interval(lo: float, hi: float) -> str:
    return f"[{100 * lo:+.2f}, {100 * hi:+.2f}] points"


def share_of_resamples(value: float, resamples: int) -> str:
    """A share of ``resamples`` at the resolution they allow: never 1.0000 or 0.0000 when
    one resample more or fewer would have changed it (``> 0.9999`` after 10,000 resamples
    that all improve). At least four decimals; more when there are over 10,000 resamples."""
    digits = max(4, math.ceil(math.log10(max(resamples, 1))))
    step = 1.0 / max(resamples, 1)
    if value >= 1.0:
        return f"> {1.0 - step:.{digits}f}"
    if value <= 0.0:
        return f"< {step:.{digits}f}"
    return f"{value:.{digits}f}"


def plain_interval(lo: float, hi: float) -> str:
    return f"[{pct(lo)}, {pct(hi)}]"


COUNTS_HEAD = ["system", "reference words", "errors", "WER", "interval of WER",
               "of which substitutions", "deletions", "insertions", "CER"]


def counts_head(report: Report) -> list[str]:
    """The counts table's head in the report's unit (under --unit char the CER is the rate
    itself, so its own column goes)."""
    head = COUNTS_HEAD[:-1] if unit_of(report) == "char" else COUNTS_HEAD
    return [say(report, h) for h in head]


def counts_rows(report: Report) -> list[tuple[object, ...]]:
    """Rows of the counts table: reference words, errors and WER with its bootstrap interval
    first, then what the errors are made of, then the character error rate."""
    b = report.bootstrap
    rows: list[tuple[object, ...]] = [
        (name, w.reference_words, w.errors, pct(w.wer), plain_interval(*ci),
         w.substitutions, w.deletions, w.insertions, pct(c.cer))
        for name, w, c, ci in (("before", report.before, report.before_cer, b.before_ci),
                               ("after", report.after, report.after_cer, b.after_ci))]
    return [r[:-1] for r in rows] if unit_of(report) == "char" else rows


def headline(report: Report) -> list[tuple[str, str, str, Any]]:
    """(label, display text, report.json key, exact value) rows of the headline table."""
    d, b = report.difference, report.bootstrap
    level = f"{100 * b.confidence:g}%"
    rows: list[tuple[str, str, str, Any]] = [
        ("WER before", pct(report.before.wer), "before.wer", report.before.wer),
        ("WER after", pct(report.after.wer), "after.wer", report.after.wer),
        ("Absolute change (after - before)", points(d.absolute), "difference.absolute",
         d.absolute),
        # the headline of the evidence: the bootstrap interval and probability of improvement
        (f"{level} interval of the change", interval(d.ci_low, d.ci_high),
         "difference.ci_low,difference.ci_high", [d.ci_low, d.ci_high]),
        ("Probability of improvement",
         share_of_resamples(d.probability_of_improvement, b.resamples),
         "difference.probability_of_improvement", d.probability_of_improvement),
        ("Relative change", signed_pct(d.relative, 1), "difference.relative", d.relative),
        (f"{level} interval of WER before", plain_interval(*b.before_ci),
         "tests.bootstrap.before_ci", list(b.before_ci)),
        (f"{level} interval of WER after", plain_interval(*b.after_ci),
         "tests.bootstrap.after_ci", list(b.after_ci)),
        ("Matched-pairs segment test p" + (
            " (exact sign test: W undefined)" if report.matched_pairs.method == "sign" else ""),
         p_value(d.matched_pairs_p), "difference.matched_pairs_p", d.matched_pairs_p),
        ("Sign test p", p_value(d.sign_test_p), "difference.sign_test_p", d.sign_test_p),
        ("Wilcoxon signed-rank p", p_value(d.wilcoxon_p), "difference.wilcoxon_p",
         d.wilcoxon_p),
    ]
    return [(say(report, label), shown, key, value) for label, shown, key, value in rows]


def method_notes(report: Report) -> list[str]:
    notes = [_bootstrap_note(report), _matched_pairs_note(report), _sign_note(report),
             _wilcoxon_note(report),
             f"Text normalisation on both sides: {report.provenance.get('normalisation')}."]
    counted = counting_text(report)
    return [say(report, n) for n in notes] + ([f"Counting: {counted}."] if counted else [])


def _bootstrap_note(report: Report) -> str:
    b = report.bootstrap
    out = (f"Paired bootstrap over {report.before.utterances} utterances: {b.resamples} "
           f"resamples, seed {b.seed}, percentile intervals; probability of improvement is "
           "the share of resamples in which the after system has the lower WER.")
    if report.before.utterances < 2:
        out += (" With one utterance every resample is the same: the intervals have zero "
                "width and say nothing about how much the WER could vary.")
    return out


def _matched_pairs_note(report: Report) -> str:
    m = report.matched_pairs
    out = (f"Matched-pairs segment test over {m.segments} segments bounded by runs of at "
           f"least {m.min_run} words both systems got right: mean difference {m.mean:+.4f}")
    if m.z is None:
        return f"{out}; {m.note}."
    return f"{out}, W = {m.z:.4f}, two-sided normal p-value."


def _sign_note(report: Report) -> str:
    s = report.sign
    return (f"Sign test: {s.improved} utterances improved, {s.worsened} worsened, {s.ties} "
            "unchanged (unchanged ones left out, exact binomial).")


def _wilcoxon_note(report: Report) -> str:
    w = report.wilcoxon
    out = (f"Wilcoxon signed-rank on per-utterance error changes: {w.n} non-zero, "
           f"{w.zeros} zero (left out)")
    if w.method == "none":
        return f"{out}; no non-zero change, so no evidence either way (p = 1)."
    return f"{out}, {w.method} p-value."


def provenance_rows(report: Report) -> list[tuple[str, str]]:
    rows = []
    for key, value in report.provenance.items():
        if key == "weights" and isinstance(value, dict) and "sha256" in value:
            rows.append(("weights", weights_text(value)))
            continue
        text = value if isinstance(value, str) else json.dumps(value, sort_keys=True,
                                                                ensure_ascii=False)
        rows.append((key, text))
    return rows


def weights_text(weights: dict[str, Any]) -> str:
    """The weights exactly as recorded (shortest round-trip floats), then file and SHA-256."""
    parts = [f"{name} {weights[name]!r}"
             for name in (LM_WEIGHT, INSERTION_PENALTY, ACOUSTIC_SCALE) if name in weights]
    parts += [f"feature {name} {value!r}"
              for name, value in sorted(weights.get("features", {}).items())]
    return f"{', '.join(parts)}; file {weights.get('file')}, sha256 {weights['sha256']}"


def group_table(key: str, groups: tuple[GroupRow, ...], report: Report | None = None
                ) -> tuple[list[str], list[tuple[Any, ...]]]:
    """Head and rows of a WER-by-metadata table; a ``note`` column marks the groups too
    small to compare, and appears only when there is one."""
    head = [key, "utterances", "ref words", "WER before", "WER after"]
    if report is not None:
        head = [key, *(say(report, h) for h in head[1:])]
    rows: list[tuple[Any, ...]] = [(g.value, g.utterances, g.reference_words,
                                    pct(g.before_wer), pct(g.after_wer)) for g in groups]
    if any(g.too_small for g in groups):
        note = f"too small to compare (under {MIN_GROUP_UTTERANCES})"
        head.append("note")
        rows = [(*r, note if g.too_small else "") for r, g in zip(rows, groups, strict=True)]
    return head, rows


def critical_table(report: Report) -> tuple[list[str], list[tuple[Any, ...]]]:
    """Head and rows of the critical-words table: per class, occurrences in the references,
    errors and error rate before and after, and how many utterances got worse on it."""
    head = ["class", "occurrences", "errors before", "rate before", "errors after",
            "rate after", "utterances worse"]
    rows = [(c.name, c.before.occurrences, c.before.errors, pct(c.before.error_rate),
             c.after.errors, pct(c.after.error_rate), len(c.worse)) for c in report.critical]
    return head, rows


def worse_text(ids: list[str], limit: int = 20) -> str:
    shown = ", ".join(ids[:limit])
    return shown if len(ids) <= limit else f"{shown} and {len(ids) - limit} more"


CRITICAL_NOTE = ("Errors on a class: its words in the reference substituted or deleted, or "
                 "its words in the hypothesis where the reference has none of them; the rate "
                 "is errors over occurrences in the references.")


def overlap_table(report: Report) -> tuple[list[str], list[tuple[Any, ...]]]:
    """Per model: test references found verbatim in its training text, and the share of the
    references' highest-order n-grams the model lists (reported, not warned on)."""
    head = ["model", "references", "found", "share", "n-gram order", "n-grams listed"]
    o = report.overlap
    if o is None:
        return head, []
    rows: list[tuple[Any, ...]] = [
        (m.model, m.references, m.found, pct(m.share),
         "-" if m.ngram_order is None else m.ngram_order, pct(m.ngram_share))
        for m in o.per_model]
    if len(o.per_model) > 1:
        rows.append(("any of them", o.references, o.found, pct(o.share), "-", "-"))
    rows += [(name, o.references, "not checked (no fingerprint)", "-", "-", "-")
             for name in o.unchecked]
    return head, rows


OVERLAP_NOTE = ("A reference counts as found when the same normalised sentence is in the "
                "model's training text (64-bit hashes kept in the model file). n-grams "
                "listed: the references' n-grams of the model's highest order that the "
                "model holds; cut-offs and pruning drop some seen in training.")
