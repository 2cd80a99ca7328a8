"""The report as Markdown: headline table, breakdowns, gate, caution, provenance."""

from __future__ import annotations

import re
from collections.abc import Sequence

from rescore.report import wording as t
from rescore.report.breakdown import Confusion
from rescore.report.build import Report
from rescore.report.confidence import CONFIDENCE_CAUTION, confidence_lines, confidence_rows


def _cell(value: object) -> str:
    """Data as Markdown text that stays text: transcripts, ids and meta keys are data, so
    none of their Markdown or HTML may take effect in any viewer."""
    return _NUMBER_OR_PUNCT.sub(_escape_match, str(value).translate(_CONTROLS))


def _escape_match(match: re.Match[str]) -> str:
    # CommonMark 0.31 "Backslash escapes": any ASCII punctuation may be escaped, and an
    # escaped character is always literal text
    return match.group() if match.lastgroup == "keep" else "\\" + match.group()


# Escaped: every character that can start or end markup inline in CommonMark or the common
# extensions (GFM tables, strikethrough and autolinks, math, footnotes, attributes, emoji,
# e-mail links): \ ` * _ [ ] < > & | ~ ! # $ ^ { } @, a colon before a non-space (https:,
# :emoji:) and a full stop inside a word (www.evil.example). Data never starts a line here
# (every cell, heading and list item has its prefix), so the line-start marks - + = and a
# digit's full stop are inert. Numbers (12.50%, +1.20) are matched first and kept whole.
_NUMBER_OR_PUNCT = re.compile(r"(?P<keep>(?<![\w.])[+-]?\d[\d,]*(?:\.\d+)?%?(?![\w.]))"
                              r"|[\\`*_\[\]<>&|~!#$^{}@]|:(?=\S)|(?<=[^\W_])\.(?=[^\W_])")
# control characters (C0, DEL, C1) and the Unicode line and paragraph separators would
# split a table row or a heading: breaks and tabs become spaces, the rest U+FFFD
_CONTROLS = {c: " " if chr(c) in "\t\n\r\v\f\u2028\u2029\x85" else "\ufffd"
             for c in [*range(0x20), *range(0x7F, 0xA0), 0x2028, 0x2029]}


def _table(head: Sequence[str], rows: Sequence[Sequence[object]],
           numeric_from: int = 1) -> list[str]:
    if not rows:
        return ["(none)", ""]
    out = ["| " + " | ".join(head) + " |",
           "|" + "|".join(" --- " if i < numeric_from else " ---: " for i in range(len(head)))
           + "|"]
    out += ["| " + " | ".join(_cell(v) for v in row) + " |" for row in rows]
    return [*out, ""]


def _confusions(rows: Sequence[Confusion]) -> list[str]:
    out = ["### Confusions", "",
           "The most frequent errors of either system, each counted in both (change: after "
           "minus before).", ""]
    out += _table(["kind", "reference", "hypothesis", "before", "after", "change"],
                  [(c.kind, c.reference or "-", c.hypothesis or "-", c.before, c.after,
                    f"{c.change:+d}") for c in rows], numeric_from=3)
    return out


def _rule_matches(rows: Sequence[Confusion]) -> list[str]:
    if not rows:
        return []
    out = ["### Counted as correct by the scoring rules", "",
           "No errors: what the rules forgave, counted in both systems.", ""]
    out += _table(["kind", "reference", "hypothesis", "before", "after"],
                  [(c.kind, c.reference, c.hypothesis or "(left out)", c.before, c.after)
                   for c in rows], numeric_from=3)
    return out


def render_markdown(report: Report) -> str:
    out = [f"# {t.title(report)}", ""]
    counted = t.counting_text(report)
    if counted:  # the header names the unit and the rules when they are not the default
        out += [f"Counting: {_cell(counted)}.", ""]
    for warning in report.warnings:
        out += [f"> **Warning.** {_cell(warning)}", ""]
    out += _table(["measure", "value"],
                  [(label, shown) for label, shown, _, _ in t.headline(report)])
    out += [f"**Caution.** {t.CAUTION}", ""]
    if report.gate is not None:
        verdict = "passed" if report.gate["passed"] else "FAILED: " + "; ".join(
            report.gate["reasons"])
        out += [f"**Release gate:** {_cell(verdict)}", ""]
    if report.confidence is not None:  # word confidences (rescore.report.confidence)
        out += ["## Word confidences", ""]
        out += [_cell(line) + "\n" for line in confidence_lines(report.confidence)]
        out += _table(*confidence_rows(report.confidence))
        out += [f"**Caution.** {_cell(CONFIDENCE_CAUTION)}", ""]
    if report.critical:
        out += ["## Critical words", ""]
        head, rows_ = t.critical_table(report)
        out += _table(head, rows_)
        for cls in report.critical:
            if cls.worse:
                out += [f"Worse on {_cell(cls.name)}: "
                        + _cell(t.worse_text([w.id for w in cls.worse])), ""]
        out += [t.CRITICAL_NOTE, ""]
    if report.overlap is not None:
        out += ["## Test references in the LM's training text", ""]
        head, rows_ = t.overlap_table(report)
        out += _table(head, rows_)
        out += [t.OVERLAP_NOTE, ""]
    out += ["## Counts", ""]
    out += _table(t.counts_head(report), t.counts_rows(report))
    out += ["## Method", ""] + [f"- {_cell(n)}" for n in t.method_notes(report)] + [""]
    out += ["## Breakdown", ""]
    out += _confusions(report.breakdown.confusions)
    out += _rule_matches(report.breakdown.rule_matches)
    by_id = {u.id: u for u in report.utterances}
    for title, ids in (("Most improved utterances", report.breakdown.improved),
                       ("Most worsened utterances", report.breakdown.worsened)):
        out += [f"### {title}", ""]
        out += _table(["id", "errors before", "errors after", "after"],
                      [(i, by_id[i].before_errors, by_id[i].after_errors,
                        report.joiner.join(by_id[i].after.hypothesis)) for i in ids])
    for key, groups in report.breakdown.by_meta.items():
        out += [t.say(report, "### WER by ") + _cell(key), ""]
        head, rows_ = t.group_table(key, groups, report)
        out += _table([_cell(h) for h in head], rows_)
    if report.breakdown.meta_skipped:
        out += ["### Metadata keys not broken down", ""]
        out += _table(["key", "why", "distinct values"],
                      [(k.key, k.reason, k.values) for k in report.breakdown.meta_skipped])
    if report.tuning is not None and report.tuning.depth:
        out += [t.say(report, "## WER by N-best depth (dev set, from tuning)"), ""]
        out += _table(["k", "1-best", "rescored", "oracle"],
                      [(r.depth, t.pct(r.one_best_wer), t.pct(r.tuned_wer), t.pct(r.oracle_wer))
                       for r in report.tuning.depth])
    out += ["## Provenance", ""]
    out += _table(["item", "value"], t.provenance_rows(report))
    return "\n".join(out)
