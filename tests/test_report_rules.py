"""The report under scoring rules and the character unit: steps the rules count as correct
are hits everywhere (tests, breakdowns, critical words) and shown apart; CER wording; the
counting in the header; records counted otherwise refused; right-to-left transcripts."""

from __future__ import annotations

import json
from html import escape
from pathlib import Path

import pytest

from rescore.counting import Counting
from rescore.report import Pair, build_report, render_all
from rescore.report.build import CAUTION
from rescore.report.critical import builtin_classes, count_alignment
from rescore.rules import parse_rules
from rescore.significance import segment_errors
from rescore.wer import Alignment, WordOp
from tests.conftest import run

RULES = parse_rules(b"name = 'desk'\nequivalent = [['ok', 'okay'], ['fifteen', '15']]\n"
                    b"optional = ['um']\n", "desk.toml")
RULED = Counting(rules=RULES)


def pairs(rows: list[tuple[str, str, str]], counting: Counting
          ) -> tuple[list[Pair], list[Pair]]:
    before = [Pair.from_text(f"u{i}", r, b, counting=counting) for i, (r, b, _) in
              enumerate(rows)]
    after = [Pair.from_text(f"u{i}", r, a, counting=counting) for i, (r, _, a) in
             enumerate(rows)]
    return before, after


ROWS = [
    # by hand, under the rules:
    #   um  ok    vent  fifteen          um  ok  vent  fifteen
    #   *   okay  went  15   (before)    um  ok  vent  15       (after)
    #   -> before 1 error (vent/went), after 0; both have 4 hits-or-errors over 4 words
    ("um ok vent fifteen", "okay went 15", "um ok vent 15"),
    ("pump two", "pump to", "pump two"),
]


def test_rule_steps_are_hits_and_shown_apart() -> None:
    before, after = pairs(ROWS, RULED)
    report = build_report(before, after, resamples=200, seed=0, counting=RULED)
    # by hand: before 2 errors (went, to) of 6 words, after none
    assert (report.before.errors, report.after.errors) == (2, 0)
    assert report.before.reference_words == report.after.reference_words == 6
    assert report.before.hits == 4
    data = report.to_dict()
    assert data["provenance"]["rules"] == RULES.provenance()
    # each step counted in both systems: "um" left out and "okay" only before, "15" in both
    matched = {(m["kind"], m["reference"], m["hypothesis"]): (m["before"], m["after"])
               for m in data["breakdown"]["rule_matches"]}
    assert matched == {("optional", "um", ""): (1, 0), ("equivalent", "ok", "okay"): (1, 0),
                       ("equivalent", "fifteen", "15"): (1, 1)}
    files = render_all(report)
    assert "### Counted as correct by the scoring rules" in files["report.md"]
    assert "| optional | um | (left out) | 1 | 0 |" in files["report.md"]
    assert "Counting: scoring rules desk (SHA-256 " in files["report.md"]
    html = files["report.html"]
    assert 'class="w-eqv" title="equivalent under the scoring rules to the reference: ok"' \
        '>okay</span>' in html
    assert '<span class="w-opt" title="optional word left out (no error)">(um)</span>' in html
    assert ".w-eqv {" in html


def test_without_rules_nothing_of_them_appears() -> None:
    before, after = pairs(ROWS, Counting())
    files = render_all(build_report(before, after, resamples=200, seed=0))
    assert "rule_matches" not in files["report.json"] and ".w-eqv" not in files["report.html"]
    assert '"rules"' not in files["report.json"] and "Counting:" not in files["report.md"]


def test_segments_count_an_equivalent_phrase_as_its_words() -> None:
    # by hand (anchors need 2 words both systems got right, min_run 2):
    #   ref     all right  vent  bay  on
    #   before  alright    vent  bay  in     (equivalent covers "all right": 2 hits)
    #   after   alright    vent  bay  on
    # all of "all right vent bay" is right in both: one anchor, then the segment "on"
    # with 1 error before and 0 after
    before = Alignment((WordOp("equivalent", "all right", "alright"),
                        WordOp("equal", "vent", "vent"), WordOp("equal", "bay", "bay"),
                        WordOp("substitute", "on", "in")))
    after = Alignment((WordOp("equivalent", "all right", "alright"),
                       WordOp("equal", "vent", "vent"), WordOp("equal", "bay", "bay"),
                       WordOp("equal", "on", "on")))
    assert segment_errors(before, after, min_run=2) == [(1, 0)]


def test_critical_numbers_forgive_an_equivalent_spelling() -> None:
    # "fifteen" said, "15" heard, equivalent under the rules: the number is right
    numbers = builtin_classes()[0]
    al = RULED.align_many([["vent", "fifteen"]], [["vent", "15"]])[0]
    counts = count_alignment(numbers, al)
    assert (counts.occurrences, counts.errors) == (1, 0)
    plain = Counting().align_many([["vent", "fifteen"]], [["vent", "15"]])[0]
    # without: substituted ("15" faces the reference number, so it is no insertion too)
    assert count_alignment(numbers, plain).errors == 1


def test_char_unit_report_says_cer() -> None:
    chars = Counting("char")
    before, after = pairs([("ポンプ止", "ボンプ止", "ポンプ止")], chars)
    report = build_report(before, after, resamples=200, seed=0, counting=chars)
    # by hand: 1 substitution of 4 characters before, none after
    assert report.before.wer == pytest.approx(0.25) and report.after.wer == 0.0
    assert report.before_cer.cer == pytest.approx(0.25)
    files = render_all(report)
    for name in ("report.md", "report.html"):
        # the caution is one fixed text in every report (it speaks of any WER): the rest
        # says CER
        shown = files[name].replace(CAUTION, "").replace(escape(CAUTION), "")
        assert "WER" not in shown, name
        assert "CER before" in files[name]
    assert "unit: characters, spaces dropped (CER)" in files["report.md"]
    data = json.loads(files["report.json"])
    assert data["provenance"]["unit"] == "char"
    # transcripts are shown as written, the characters not spaced apart
    assert data["utterances"][0]["reference"] == "ポンプ止"
    assert '<span class="w-sub" title="reference: ポ">ボ</span>ンプ止' in files["report.html"]


def test_right_to_left_transcripts_get_dir_auto() -> None:
    # Hebrew letters have bidirectional class R (source: the Unicode Character Database,
    # as Python's unicodedata.bidirectional reports it)
    before, after = pairs([("המשאבה נסגרה", "המשאבה נפתחה", "המשאבה נסגרה"),
                           ("pump two", "pump to", "pump two")], Counting())
    html = render_all(build_report(before, after, resamples=200, seed=0))["report.html"]
    utterances = html.split('<ol class="utts">')[1]
    assert utterances.count('<td dir="auto">') == 3  # reference, before, after of the first
    assert "<td>reference</td><td>pump two</td>" in html


def _nbest(path: Path, rows: list[tuple[str, str]]) -> Path:
    path.write_text("".join(json.dumps({"id": f"u{i}", "reference": r, "hypotheses": [
        {"text": h, "acoustic": -1.0}]}) + "\n" for i, (r, h) in enumerate(rows)),
        encoding="utf-8")
    return path


def test_report_command_refuses_a_tuning_record_under_other_rules(tmp_path: Path) -> None:
    before = _nbest(tmp_path / "b.jsonl", [("um ok vent", "okay vent")])
    after = _nbest(tmp_path / "a.jsonl", [("um ok vent", "ok vent")])
    rules = tmp_path / "desk.toml"
    rules.write_bytes(b"equivalent = [['ok', 'okay']]\noptional = ['um']\n")
    tuning = tmp_path / "tuning.json"
    tuning.write_text(json.dumps({"depth": [], "provenance": {"package": "rescore"}}))
    out = tmp_path / "report"
    got = run(["report", "--before", before, "--after", after, "-o", out, "--rules", rules,
               "--tuning", tuning, "--resamples", "100"])
    assert got.exit_code == 1 and not out.exists()
    assert got.stderr.splitlines()[0] == (
        f"error: {tuning}: rules: the tuning record's errors were scored under no rules "
        f"file, this run under rules 'desk' (SHA-256 {parse_rules(rules.read_bytes()).sha256[:12]}"
        "); score both under the same --rules file")
    ok = run(["report", "--before", before, "--after", after, "-o", out, "--rules", rules,
              "--resamples", "100", "--json"])
    assert ok.exit_code == 0, ok.stderr
    data = json.loads(ok.stdout)
    # by hand: before "um" optional, ok~okay, vent: no error; after the same
    assert data["before"]["wer"] == 0.0 and data["provenance"]["rules"]["name"] == "desk"
    char = run(["report", "--before", before, "--after", after, "-o", tmp_path / "c",
                "--unit", "char", "--resamples", "100"])
    assert char.exit_code == 0 and "CER" in char.stdout


def test_overlap_reads_references_as_the_models_text_was_read(tmp_path: Path) -> None:
    # the rules drop "[noise]" before scoring, but the LM's text was normalised plainly
    # ("[noise]" -> "noise"): the reference "[noise] vent bay" is that text's sentence
    corpus = tmp_path / "train.txt"
    corpus.write_text("[noise] vent bay\n", encoding="utf-8")
    model = tmp_path / "w.lm"
    assert run(["lm", "build", corpus, "--order", "2", "-o", model]).exit_code == 0
    before = _nbest(tmp_path / "b.jsonl", [("[noise] vent bay", "vent bay")])
    rules = tmp_path / "r.toml"
    rules.write_bytes(b"ignore = ['[noise]']\n")
    got = run(["report", "--before", before, "--after", before, "--lm", model, "--rules",
               rules, "-o", tmp_path / "r", "--resamples", "100", "--json"])
    assert got.exit_code == 0, got.stderr
    report = json.loads((tmp_path / "r" / "report.json").read_text())
    assert report["overlap"]["found"] == 1
    assert report["before"]["wer"] == 0.0  # "[noise]" ignored: "vent bay" against "vent bay"
