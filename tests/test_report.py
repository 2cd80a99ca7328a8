"""The report library: contract keys, determinism, escaping, breakdowns, atomic writing."""

from __future__ import annotations

import json
import re
from html import unescape
from pathlib import Path

import numpy as np
import pytest

from rescore.errors import InputError
from rescore.report import (
    FILES,
    Pair,
    build_report,
    gate_failures,
    render_all,
    with_gate,
    write_report,
)
from rescore.report.build import CAUTION
from rescore.report.html import marked_words
from rescore.report.plots import chosen_cell, colour_limits
from rescore.text import NORMALISATION
from rescore.tune.results import DepthRow, Surface, TuningRecord
from rescore.wer import align


def w(text: str) -> list[str]:
    """Words of a space-separated string."""
    return text.split()

ROOT = Path(__file__).resolve().parent.parent
TOL = 1e-12
CONTRACT_DIFFERENCE = {"absolute", "relative", "ci_low", "ci_high",
                       "probability_of_improvement", "matched_pairs_p", "sign_test_p", "wilcoxon_p"}
WER_KEYS = {"wer", "substitutions", "deletions", "insertions", "hits", "reference_words",
            "utterances"}
HOSTILE_ID = 'bay<script>window.__pwned=1</script>"onload=alert(1)'
# '<', '>' and '=' are symbols, not punctuation, so they survive normalisation and a hostile
# transcript reaches the writers
HOSTILE_TEXT = 'pH é <script>window.__pwned=2</script> "onload=alert(2)'


def systems() -> tuple[list[Pair], list[Pair]]:
    refs = ["vent bay three opened to forty percent", "lamp bank four dimmed",
            "pump two primed at six", "ec reading one point eight"]
    before = ["went bay three opened to forty percent", "lamp bank for dimmed",
              "pump to primed at six", "ec reading one point eight"]
    after = ["vent bay three opened to forty percent", "lamp bank four dimmed",
             "pump to primed at six six", "ec reading one point eight"]
    meta = [{"speaker": "s01"}, {"speaker": "s02"}, {"speaker": "s01"}, {"speaker": "s02"}]
    ids = [f"lark-{i:04d}" for i in range(1, 5)]
    rows = list(zip(ids, refs, before, after, meta, strict=True))
    return ([Pair.from_text(i, r, b, m) for i, r, b, _, m in rows],
            [Pair.from_text(i, r, a, m) for i, r, _, a, m in rows])


def test_contract_keys_and_numbers() -> None:
    before, after = systems()
    report = build_report(before, after, provenance={"data_sha256": {"x": "0"}},
                          resamples=500, seed=1)
    data = json.loads(render_all(report)["report.json"])
    assert set(data["before"]) == WER_KEYS and set(data["after"]) == WER_KEYS
    assert set(data["difference"]) >= CONTRACT_DIFFERENCE
    # derived by hand: 21 reference words (7 + 4 + 5 + 5); before has 3 substitutions
    # (went, for, to), after 1 substitution (to) and 1 insertion (six)
    assert data["before"]["wer"] == pytest.approx(3 / 21, abs=TOL)
    assert data["after"]["wer"] == pytest.approx(2 / 21, abs=TOL)
    d = data["difference"]
    assert d["absolute"] == pytest.approx(data["after"]["wer"] - data["before"]["wer"], abs=TOL)
    assert d["relative"] == pytest.approx(-1 / 3, abs=TOL)
    assert [d["ci_low"], d["ci_high"]] == data["tests"]["bootstrap"]["difference_ci"]
    prov = data["provenance"]
    assert prov["normalisation"] == NORMALISATION
    assert prov["bootstrap"]["seed"] == 1 and prov["bootstrap"]["resamples"] == 500
    assert prov["data_sha256"] == {"x": "0"}
    assert "version" in prov


def test_same_inputs_give_byte_identical_files(tmp_path: Path) -> None:
    # the release review must be able to regenerate the exact files
    before, after = systems()
    tuning = {"surface": {"lm_weight": [0, 1], "insertion_penalty": [-1, 0, 1],
                          "errors": [[5, 4, 6], [3, 2, 4]]}}
    for name in ("a", "b"):
        write_report(build_report(before, after, provenance={}, tuning=tuning,
                                  resamples=300, seed=3), tmp_path / name)
    for f in FILES:
        assert (tmp_path / "a" / f).read_bytes() == (tmp_path / "b" / f).read_bytes()


def test_mismatched_ids_name_the_missing_ones() -> None:
    before, after = systems()
    with pytest.raises(InputError, match="4 utterances before, 3 after; missing from after: "
                                         "lark-0004"):
        build_report(before, after[:3], provenance={})


def test_different_references_are_refused() -> None:
    before, after = systems()
    after[0] = Pair.from_text("lark-0001", "vent bay two", "vent bay two")
    with pytest.raises(InputError, match="different references"):
        build_report(before, after, provenance={})


def test_breakdown_counts_and_meta_groups() -> None:
    before, after = systems()
    b = build_report(before, after, provenance={}, resamples=200).breakdown
    # derived by hand from the transcripts in systems()
    # before: went, for and to each once; after: to once and the insertion of six. One
    # table, each error counted in both systems, the most frequent first, then the count
    # before, the kind (substitution, deletion, insertion) and the words
    table = [(c.kind, c.reference, c.hypothesis, c.before, c.after, c.change)
             for c in b.confusions]
    assert table == [("substitution", "four", "for", 1, 0, -1),
                     ("substitution", "two", "to", 1, 1, 0),
                     ("substitution", "vent", "went", 1, 0, -1),
                     ("insertion", "", "six", 0, 1, 1)]
    assert b.improved == ("lark-0001", "lark-0002")
    assert b.worsened == ("lark-0003",)
    speakers = {g.value: (g.before_errors, g.after_errors) for g in b.by_meta["speaker"]}
    assert speakers == {"s01": (2, 2), "s02": (1, 0)}


def test_meta_keys_not_broken_down_are_listed_with_the_reason() -> None:
    # 60 utterances: "shift" takes 2 values (broken down), "session" 60 (more than the cap
    # of 50, so left out and listed), "site" one value, "tags" lists; counted by hand
    ref = "vent bay three opened"
    before, after = [], []
    for i in range(60):
        meta = {"shift": "day" if i % 2 else "night", "session": f"s{i:02d}",
                "site": "larkspur", "tags": ["a", "b"] if i % 3 else ["a"]}
        before.append(Pair.from_text(f"u{i}", ref, "went bay three opened", meta))
        after.append(Pair.from_text(f"u{i}", ref, ref, meta))
    report = build_report(before, after, provenance={}, resamples=100)
    assert list(report.breakdown.by_meta) == ["shift"]
    files = render_all(report)
    skipped = json.loads(files["report.json"])["breakdown"]["by_meta_skipped"]
    assert skipped == [
        {"key": "session", "values": 60, "reason": "60 values, more than 50"},
        {"key": "site", "values": 1, "reason": "one value for every utterance"},
        {"key": "tags", "values": 2, "reason": "holds lists or objects, not single values"},
    ]
    assert "### Metadata keys not broken down" in files["report.md"]
    assert "| session | 60 values, more than 50 | 60 |" in files["report.md"]
    assert "Metadata keys not broken down" in files["report.html"]
    assert ('<td>session</td><td>60 values, more than 50</td><td class="num">60</td>'
            in files["report.html"])


def test_meta_key_at_the_cap_is_broken_down() -> None:
    # the cap is inclusive: exactly 50 values still get a table (breakdown.MAX_GROUPS)
    ref = "vent bay"
    pairs = [Pair.from_text(f"u{i}", ref, ref, {"session": i}) for i in range(50)]
    report = build_report(pairs, pairs, provenance={}, resamples=50)
    assert len(report.breakdown.by_meta["session"]) == 50
    assert report.breakdown.meta_skipped == ()


def test_hostile_text_is_escaped_everywhere() -> None:
    before, after = systems()
    before.append(Pair.from_text(HOSTILE_ID, "pH é ok", HOSTILE_TEXT))
    after.append(Pair.from_text(HOSTILE_ID, "pH é ok", HOSTILE_TEXT))
    files = render_all(build_report(before, after, provenance={}, resamples=200))
    page, md = files["report.html"], files["report.md"]
    assert "<script>window.__pwned" not in page
    assert "&lt;script&gt;window.__pwned=1&lt;/script&gt;&quot;onload=alert(1)" in page
    assert page.count("<script>") == 1  # the page's own filter script only
    # CommonMark backslash escapes: "\<" is a literal "<", never the start of HTML
    assert "<script>" not in md and r"\<script\>" in md
    assert json.loads(files["report.json"])["utterances"][-1]["id"] == HOSTILE_ID


def test_html_is_self_contained() -> None:
    before, after = systems()
    page = render_all(build_report(before, after, provenance={}, resamples=200))["report.html"]
    # SVG's xmlns names a namespace and fetches nothing; nothing else may point outside
    stripped = page.replace('xmlns="http://www.w3.org/2000/svg"', "").replace(
        'xmlns:xlink="http://www.w3.org/1999/xlink"', "")
    for marker in ("http://", "https://", "src=", "@import", "//"):
        assert marker not in stripped, marker
    # url() only for the SVG's own clip paths
    assert re.findall(r"url\((?!#)", stripped) == []
    assert "default-src &#x27;none&#x27;" in page  # the CSP, attribute-escaped


def test_caution_in_every_report_file_and_the_readme() -> None:
    # the caution itself: a WER on one set says nothing certain about another, and
    # medical, legal or safety use needs validation on deployment data under that field's
    # rules and licensed practice (common practice in speech-recognition evaluation)
    assert "guarantees nothing on another" in CAUTION
    assert "medical, legal or safety" in CAUTION and "licensed practitioners" in CAUTION
    before, after = systems()
    files = render_all(build_report(before, after, provenance={}, resamples=200))
    assert json.loads(files["report.json"])["caution"] == CAUTION
    assert f"**Caution.** {CAUTION}" in files["report.md"]
    footer = re.search(r'<div class="caution" id="caution">(.*?)</div>', files["report.html"])
    assert footer is not None
    assert unescape(footer.group(1)) == f"<strong>Caution.</strong> {CAUTION}"
    # the README's blockquote, its line breaks and quote markers removed
    readme = (ROOT / "README.md").read_text(encoding="utf-8")
    quoted = " ".join(line.removeprefix(">").strip() for line in readme.splitlines()
                      if line.startswith(">"))
    assert f"**Caution.** {CAUTION}" in quoted


def test_matched_pairs_fallback_is_shown_in_every_output() -> None:
    # derived by hand: two utterances, each with one error that after fixes, give segment
    # differences (-1, -1); W is undefined and p is the exact sign test's 2 * 0.5**2 = 0.5
    ref = "vent bay three opened"
    before = [Pair.from_text("a", ref, "went bay three opened"),
              Pair.from_text("b", ref, "vent day three opened")]
    after = [Pair.from_text("a", ref, ref), Pair.from_text("b", ref, ref)]
    files = render_all(build_report(before, after, provenance={}, resamples=200))
    data = json.loads(files["report.json"])
    mp = data["tests"]["matched_pairs"]
    assert (mp["method"], mp["z"], mp["p_value"]) == ("sign", None, 0.5)
    assert data["difference"]["matched_pairs_p"] == 0.5
    for name in ("report.md", "report.html"):
        assert "Matched-pairs segment test p (exact sign test: W undefined)" in files[name]
        assert "all 2 segment differences equal -1, so W is undefined" in files[name]
        assert "0.5000" in files[name] and "&lt; 0.0001" not in files[name]


def test_marked_words_show_each_difference() -> None:
    # one substitution, one deletion, one insertion, each marked with its own element
    html = marked_words(align(w("bay three pump row vent"), w("day three row vent on")))
    assert '<span class="w-sub" title="reference: bay">day</span>' in html
    assert '<del title="deleted">pump</del>' in html
    assert '<ins title="inserted">on</ins>' in html


def test_nothing_written_when_rendering_fails(tmp_path: Path,
                                              monkeypatch: pytest.MonkeyPatch) -> None:
    before, after = systems()
    report = build_report(before, after, provenance={}, resamples=200)

    def boom(_: object) -> str:
        raise RuntimeError("plot failed")

    monkeypatch.setattr("rescore.report.html.render_html", boom)
    with pytest.raises(RuntimeError):
        write_report(report, tmp_path / "out")
    assert not (tmp_path / "out").exists() or not any((tmp_path / "out").iterdir())


def test_gates() -> None:
    before, after = systems()
    report = build_report(before, after, provenance={}, resamples=200)
    assert gate_failures(report, max_wer=0.2, max_regression=0.0) == []
    # 2/21 = 9.52 % after; the message is in percent like the rest of the report
    assert gate_failures(report, max_wer=0.05) == ["after WER 9.52% is above --max-wer 5%"]
    # swapped, the change is a regression of +1/21
    worse = build_report(after, before, provenance={}, resamples=200)
    assert gate_failures(worse, max_regression=0.01) == [
        "WER change +4.76 points is above --max-regression 1 points"]
    gated = with_gate(worse, max_wer=None, max_regression=0.01)
    assert gated.gate is not None and gated.gate["passed"] is False


def test_heatmap_star_marks_the_chosen_weights() -> None:
    # derived by hand: the first grid minimum (2 errors) is at LM 0, penalty -1, but the
    # tuner chose LM 2, penalty 0 (a plateau centre): the star goes where the title says
    surface = Surface(np.array([0.0, 1.0, 2.0]), np.array([-1.0, 0.0, 1.0]),
                      np.array([[2.0, 3.0, 4.0], [3.0, 2.0, 3.0], [2.0, 2.0, 2.0]]))
    assert chosen_cell(surface, TuningRecord(surface, (), 2.0, 0.0)) == (2, 1)
    # weights between grid points take the nearest cell (1.4 -> 1.0, 0.6 -> 1.0)
    assert chosen_cell(surface, TuningRecord(surface, (), 1.4, 0.6)) == (1, 2)
    # no chosen weights recorded: the first minimum in row order
    assert chosen_cell(surface, TuningRecord(surface)) == (0, 0)


def test_heatmap_colour_scale_stops_at_the_90th_percentile() -> None:
    # source: numpy.percentile's default linear interpolation, by hand: ten values sorted
    # 1..9, 100; rank 0.9 * 9 = 8.1 lies between 9 and 100, so 9 + 0.1 * 91 = 18.1
    low, high, capped = colour_limits([[1, 2, 3, 4, 5], [6, 7, 8, 9, 100]])
    assert (low, capped) == (1.0, True) and high == pytest.approx(18.1, abs=TOL)
    # a flat surface, or one whose top tenth is its maximum, keeps its full range
    assert colour_limits([[3, 3], [3, 3]]) == (3.0, 3.0, False)
    assert colour_limits([[1, 5], [5, 5]]) == (1.0, 5.0, False)


def test_tuning_record_reads_what_tune_writes_and_checks_shapes() -> None:
    # one schema both ways: the record of a run, written and read back, is the same record
    surface = Surface(np.array([0.0, 1.0]), np.array([-1.0, 0.0, 1.0]),
                      np.array([[5.0, 4.0, 6.0], [3.0, 2.0, 3.0]]))
    rows = (DepthRow(1, "1", 0.2, 0.2, 0.2), DepthRow(5, "all", 0.2, 0.1, 0.05))
    record = TuningRecord(surface, rows, 1.0, 0.0)
    again = TuningRecord.from_dict(json.loads(json.dumps(record.to_dict())))
    assert again.to_dict() == record.to_dict() and again.depth == rows
    assert TuningRecord.from_dict({"lm_weight": 0.8}).surface is None
    assert TuningRecord.from_dict({"surface": None, "depth": []}).to_dict() == {}
    # a row missing a value names it, as every reader error does
    with pytest.raises(InputError, match=r"depth\[1\]\.oracle_wer"):
        TuningRecord.from_dict({"depth": [rows[0].to_dict(), {"depth": 5, "one_best_wer": 0.2,
                                                              "tuned_wer": 0.1}]})
    with pytest.raises(InputError, match=r"surface\.errors"):
        TuningRecord.from_dict({"surface": {"lm_weight": [0, 1], "insertion_penalty": [0],
                                            "errors": [[1, 2]]}})


@pytest.mark.parametrize(("value", "resamples", "shown"), [
    # every one of 10,000 resamples improved: the estimate is 1 but its resolution is
    # 1/10,000, so all that can be said is "above 0.9999"
    (1.0, 10_000, "> 0.9999"),
    (0.0, 10_000, "< 0.0001"),
    (0.5, 10_000, "0.5000"),
    # 199/200 is shown as it is; with 200 resamples the next step below 1 is 0.995
    (199 / 200, 200, "0.9950"),
    (1.0, 200, "> 0.9950"),
    # 100,000 resamples resolve a fifth decimal: 99,999/100,000 must not print as 1.0000
    (99_999 / 100_000, 100_000, "0.99999"),
    (1.0, 100_000, "> 0.99999"),
])
def test_probability_at_the_resolution_of_the_resamples(value: float, resamples: int,
                                                        shown: str) -> None:
    from rescore.report.wording import share_of_resamples

    assert share_of_resamples(value, resamples) == shown


def test_absolute_change_in_points_and_small_sets_warned() -> None:
    before, after = systems()
    report = build_report(before, after, provenance={}, resamples=200)
    files = render_all(report)
    # (2 - 3) / 21 = -4.76 percentage points, not "-4.76%" (that would be relative)
    assert "| Absolute change (after - before) | -4.76 points |" in files["report.md"]
    # 4 utterances < 100, and both speakers have 2 < 30 utterances (common practice)
    data = json.loads(files["report.json"])
    assert data["warnings"][0].startswith("only 4 test utterances (fewer than 100)")
    assert "(by speaker) are too small to compare" in data["warnings"][1]
    assert all(g["too_small"] for g in data["breakdown"]["by_meta"]["speaker"])
    # s01: 7 + 5 = 12 reference words; before went, to (2 errors); after to, +six (2)
    assert ("| s01 | 2 | 12 | 16.67% | 16.67% | too small to compare (under 30) |"
            in files["report.md"])
    assert files["report.html"].count('<div class="warning">') == 2
    # the caution follows the headline table, before the counts, in both writers
    md = files["report.md"]
    assert md.index("Wilcoxon signed-rank p") < md.index("**Caution.**") < md.index("## Counts")
    page = files["report.html"]
    assert page.index('class="headline"') < page.index('id="caution"') < page.index(
        "substitutions")


def test_large_even_groups_are_not_warned() -> None:
    # 120 utterances, two speakers of 60: above both thresholds, no warning, no note column
    before, after = systems()
    big_b = [Pair(f"{p.id}-{i}", p.reference, p.hypothesis, p.meta)
             for i in range(30) for p in before]
    big_a = [Pair(f"{p.id}-{i}", p.reference, p.hypothesis, p.meta)
             for i in range(30) for p in after]
    report = build_report(big_b, big_a, provenance={}, resamples=50)
    assert report.warnings == ()
    assert "too small" not in render_all(report)["report.md"]
