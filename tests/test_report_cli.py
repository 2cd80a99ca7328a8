"""``rescore report`` through typer's CliRunner: files, JSON, errors, gate, reproducibility."""

from __future__ import annotations

import hashlib
import html
import json
from pathlib import Path

import pytest
from click.testing import Result
from markdown_it import MarkdownIt
from typer.testing import CliRunner

from rescore.checksum import sha256_file
from rescore.cli import app
from rescore.report import FILES

TOL = 1e-12
REFS = {
    "lark-0001": "vent bay three opened to forty percent",
    "lark-0002": "lamp bank four dimmed",
    "lark-0003": "pump two primed at six",
}
BEFORE = {"lark-0001": "went bay three opened to forty percent",
          "lark-0002": "lamp bank for dimmed", "lark-0003": "pump two primed at six"}
AFTER = {"lark-0001": "vent bay three opened to forty percent",
         "lark-0002": "lamp bank four dimmed", "lark-0003": "pump two primed at six"}


def invoke(args: list[str | Path]) -> Result:
    return CliRunner().invoke(app, [str(a) for a in args], catch_exceptions=False)


def write_tsv(path: Path, rows: dict[str, str]) -> Path:
    path.write_text("".join(f"{k}\t{v}\n" for k, v in rows.items()), encoding="utf-8")
    return path


def write_nbest(path: Path, best: int | None) -> Path:
    """Two hypotheses per utterance: the before text first, the after text second."""
    lines = []
    for k, ref in REFS.items():
        rec: dict[str, object] = {
            "id": k, "reference": ref,
            "hypotheses": [{"text": BEFORE[k], "acoustic": -10.0},
                           {"text": AFTER[k], "acoustic": -11.0}],
            "meta": {"speaker": "s01" if k != "lark-0002" else "s02"}}
        if best is not None:
            rec["best"] = best
        lines.append(json.dumps(rec))
    path.write_text("\n".join(lines) + "\n", encoding="utf-8")
    return path


@pytest.fixture
def nbest_pair(tmp_path: Path) -> tuple[Path, Path]:
    return write_nbest(tmp_path / "test.jsonl", None), write_nbest(tmp_path / "out.jsonl", 1)


def test_report_from_nbest_files(tmp_path: Path, nbest_pair: tuple[Path, Path]) -> None:
    before, after = nbest_pair
    out = tmp_path / "rep"
    res = invoke(["report", "--before", before, "--after", after, "-o", out,
                  "--resamples", "300", "--seed", "7", "--json"])
    assert res.exit_code == 0, res.output
    printed = json.loads(res.stdout)
    saved = json.loads((out / "report.json").read_text())
    assert printed["difference"] == saved["difference"]
    for name in FILES:
        assert (out / name).is_file()
    # derived by hand: 16 reference words; the 1-best of test.jsonl (no "best": the first
    # hypothesis) has 2 substitutions, the rescored file's best has none
    assert saved["before"]["wer"] == pytest.approx(2 / 16, abs=TOL)
    assert saved["after"]["wer"] == 0.0
    assert saved["difference"]["absolute"] == pytest.approx(-2 / 16, abs=TOL)
    prov = saved["provenance"]
    assert prov["data_sha256"] == {str(before): sha256_file(before),
                                   str(after): sha256_file(after)}
    assert prov["bootstrap"]["seed"] == 7 and prov["bootstrap"]["resamples"] == 300
    assert [g["value"] for g in saved["breakdown"]["by_meta"]["speaker"]] == ["s01", "s02"]


def test_report_from_transcripts_with_refs(tmp_path: Path) -> None:
    refs = write_tsv(tmp_path / "refs.tsv", REFS)
    before = write_tsv(tmp_path / "before.tsv", BEFORE)
    after = write_tsv(tmp_path / "after.tsv", AFTER)
    res = invoke(["report", "--before", before, "--after", after, "--refs", refs,
                  "-o", tmp_path / "rep", "--resamples", "200"])
    assert res.exit_code == 0, res.output
    saved = json.loads((tmp_path / "rep" / "report.json").read_text())
    assert saved["before"]["substitutions"] == 2 and saved["after"]["wer"] == 0.0
    assert str(refs) in saved["provenance"]["data_sha256"]


def test_missing_transcript_is_one_error_line(tmp_path: Path) -> None:
    refs = write_tsv(tmp_path / "refs.tsv", REFS)
    before = write_tsv(tmp_path / "before.tsv", BEFORE)
    short = dict(AFTER)
    del short["lark-0003"]
    after = write_tsv(tmp_path / "after.tsv", short)
    res = invoke(["report", "--before", before, "--after", after, "--refs", refs,
                  "-o", tmp_path / "rep"])
    assert res.exit_code == 1
    assert res.stderr.strip() == (f"error: {after}: 3 references for 2 utterances; "
                                  "missing ids: lark-0003")
    assert not (tmp_path / "rep").exists()


def test_transcript_without_refs_is_refused(tmp_path: Path) -> None:
    before = write_tsv(tmp_path / "before.tsv", BEFORE)
    res = invoke(["report", "--before", before, "--after", before, "-o", tmp_path / "rep"])
    assert res.exit_code == 1
    assert "needs references (--refs FILE)" in res.stderr
    assert len(res.stderr.strip().splitlines()) == 1


@pytest.mark.parametrize(("option", "value", "reason"), [
    ("--max-wer", "0.01", "after WER 12.50% is above --max-wer 1%"),
    ("--max-wer", "1%", "after WER 12.50% is above --max-wer 1%"),
    ("--max-regression", "0.05", "WER change +12.50 points is above --max-regression 5 points"),
    ("--max-regression", "5%", "WER change +12.50 points is above --max-regression 5 points"),
])
def test_gate_fails_after_writing(tmp_path: Path, nbest_pair: tuple[Path, Path],
                                  option: str, value: str, reason: str) -> None:
    # before and after swapped: the "after" system is the worse one, WER 2/16 = 0.125
    good, bad = nbest_pair[1], nbest_pair[0]
    out = tmp_path / "rep"
    res = invoke(["report", "--before", good, "--after", bad, "-o", out,
                  "--resamples", "200", option, value])
    assert res.exit_code == 3
    # the warnings (3 utterances; 1-utterance speakers) and the caution come first, then
    # the one error line
    lines = res.stderr.strip().splitlines()
    assert lines[-1] == f"error: release gate failed: {reason} (report written to {out})"
    assert [line.split(":")[0] for line in lines] == ["warning", "warning", "caution", "error"]
    saved = json.loads((out / "report.json").read_text())
    assert saved["gate"]["passed"] is False and saved["gate"]["reasons"] == [reason]
    assert "Release gate failed" in (out / "report.html").read_text()


def test_gate_passes(tmp_path: Path, nbest_pair: tuple[Path, Path]) -> None:
    res = invoke(["report", "--before", nbest_pair[0], "--after", nbest_pair[1],
                  "-o", tmp_path / "rep", "--resamples", "200",
                  "--max-wer", "0.05", "--max-regression", "0"])
    assert res.exit_code == 0, res.output
    assert json.loads((tmp_path / "rep" / "report.json").read_text())["gate"]["passed"]


@pytest.mark.parametrize("option", ["--max-wer", "--max-regression"])
@pytest.mark.parametrize("value", ["5", "-1", "150%", "-0.5%", "1.5", "five", "nan", "inf%"])
def test_gate_threshold_out_of_range_is_a_usage_error(tmp_path: Path,
                                                       nbest_pair: tuple[Path, Path],
                                                       option: str, value: str) -> None:
    # a bare 5 would be read as 500 %: refused, with both accepted forms shown
    res = invoke(["report", "--before", nbest_pair[0], "--after", nbest_pair[1],
                  "-o", tmp_path / "rep", "--resamples", "200", option, value])
    assert res.exit_code == 2, res.output
    assert res.stderr.strip().splitlines() == [
        f"error: {option} {value!r}: expected a percentage from 0% to 100% (5%) or a "
        "fraction from 0 to 1 (0.05)"]
    assert not (tmp_path / "rep").exists()


def test_gate_percentage_and_fraction_are_the_same_gate(tmp_path: Path,
                                                        nbest_pair: tuple[Path, Path]) -> None:
    # 5% and 0.05 are one threshold: the recorded gates are equal
    gates = []
    for name, value in (("pct", "5%"), ("frac", "0.05")):
        res = invoke(["report", "--before", nbest_pair[0], "--after", nbest_pair[1],
                      "-o", tmp_path / name, "--resamples", "200", "--max-wer", value])
        assert res.exit_code == 0, res.output
        gates.append(json.loads((tmp_path / name / "report.json").read_text())["gate"])
    assert gates[0] == gates[1] and gates[0]["max_wer"] == 0.05


def test_same_inputs_same_bytes(tmp_path: Path, nbest_pair: tuple[Path, Path]) -> None:
    tuning = tmp_path / "tuning.json"
    tuning.write_text(json.dumps({
        "surface": {"lm_weight": [0.0, 0.5, 1.0], "insertion_penalty": [-1.0, 0.0],
                    "errors": [[9, 8], [7, 5], [6, 7]]},
        "depth": [{"depth": 1, "one_best_wer": 0.2, "tuned_wer": 0.2, "oracle_wer": 0.2},
                  {"depth": 2, "one_best_wer": 0.2, "tuned_wer": 0.1, "oracle_wer": 0.05}],
        "lm_weight": 0.5, "insertion_penalty": 0.0, "search": "grid"}))
    for name in ("a", "b"):
        res = invoke(["report", "--before", nbest_pair[0], "--after", nbest_pair[1],
                      "-o", tmp_path / name, "--resamples", "200", "--tuning", tuning])
        assert res.exit_code == 0, res.output
    for f in FILES:
        assert (tmp_path / "a" / f).read_bytes() == (tmp_path / "b" / f).read_bytes()
    page = (tmp_path / "a" / "report.html").read_text()
    assert 'aria-label="tuning error surface"' in page
    assert 'aria-label="WER by N-best depth"' in page


def test_bad_tuning_file(tmp_path: Path, nbest_pair: tuple[Path, Path]) -> None:
    tuning = tmp_path / "tuning.json"
    tuning.write_text('{"surface": {"lm_weight": [0, 1], "insertion_penalty": [0], '
                      '"errors": [[1]]}}')
    res = invoke(["report", "--before", nbest_pair[0], "--after", nbest_pair[1],
                  "-o", tmp_path / "rep", "--tuning", tuning])
    assert res.exit_code == 1
    assert res.stderr.startswith(f"error: {tuning}: surface.errors: errors should be 2 rows")
    assert not (tmp_path / "rep").exists()


def test_weights_go_into_provenance(tmp_path: Path, nbest_pair: tuple[Path, Path]) -> None:
    weights = tmp_path / "weights.json"
    weights.write_text(json.dumps({
        "acoustic_scale": 1.0, "lm_weight": 0.8125, "insertion_penalty": -0.5,
        "features": {"first_pass_lm": 0.25}, "provenance": {"search": "grid"}}))
    out = tmp_path / "rep"
    res = invoke(["report", "--before", nbest_pair[0], "--after", nbest_pair[1], "-o", out,
                  "--resamples", "200", "--weights", weights, "--json"])
    assert res.exit_code == 0, res.output
    # source: hashlib.sha256 of the file's bytes, computed here independently
    digest = hashlib.sha256(weights.read_bytes()).hexdigest()
    expected = {"file": str(weights), "sha256": digest, "acoustic_scale": 1.0,
                "lm_weight": 0.8125, "insertion_penalty": -0.5,
                "features": {"first_pass_lm": 0.25}}
    assert json.loads((out / "report.json").read_text())["provenance"]["weights"] == expected
    assert json.loads(res.stdout)["provenance"]["weights"] == expected
    shown = (f"lm_weight 0.8125, insertion_penalty -0.5, acoustic_scale 1.0, feature "
             f"first_pass_lm 0.25; file {weights}, sha256 {digest}")
    # the Markdown escapes data (report/markdown.py): compare the text a viewer shows
    rendered = MarkdownIt("commonmark").enable("table").render((out / "report.md").read_text())
    assert shown in html.unescape(rendered)
    assert shown in (out / "report.html").read_text()


def test_report_without_weights_records_none(tmp_path: Path,
                                             nbest_pair: tuple[Path, Path]) -> None:
    res = invoke(["report", "--before", nbest_pair[0], "--after", nbest_pair[1],
                  "-o", tmp_path / "rep", "--resamples", "200"])
    assert res.exit_code == 0, res.output
    assert "weights" not in json.loads((tmp_path / "rep" / "report.json").read_text())[
        "provenance"]


@pytest.mark.parametrize(("content", "message"), [
    ('{"acoustic_scale": 1, "lm_weight": "high", "insertion_penalty": 0}',
     "lm_weight: "),
    ('{"acoustic_scale": 1, "lm_weight": 1, "insertion_penalty": 0, "lm_wieght": 2}',
     "lm_wieght: unknown key"),
    ('{"acoustic_scale": 1, "lm_weight": 1', "invalid JSON"),
])
def test_bad_weights_file_is_one_error_and_no_report(
        tmp_path: Path, nbest_pair: tuple[Path, Path], content: str, message: str) -> None:
    weights = tmp_path / "weights.json"
    weights.write_text(content)
    res = invoke(["report", "--before", nbest_pair[0], "--after", nbest_pair[1],
                  "-o", tmp_path / "rep", "--weights", weights])
    assert res.exit_code == 1
    lines = res.stderr.strip().splitlines()
    assert len(lines) == 1 and lines[0].startswith(f"error: {weights}")
    assert message in lines[0]
    assert not (tmp_path / "rep").exists()
def test_interrupted_report_leaves_no_partial_set(tmp_path: Path, nbest_pair: tuple[Path, Path],
                                                  monkeypatch: pytest.MonkeyPatch) -> None:
    # Reliability audit: the three files were written one after another, so an interrupt
    # between them left a new report.json beside an old report.md and report.html. Here an
    # interrupt arrives while the last file is synced: the previous set must stay whole.
    import os

    before, after = nbest_pair
    out = tmp_path / "rep"
    assert invoke(["report", "--before", before, "--after", before, "-o", out,
                   "--resamples", "50"]).exit_code == 0
    previous = {name: (out / name).read_bytes() for name in FILES}
    real_fsync, calls = os.fsync, []

    def interrupted_third(fd: int) -> None:
        calls.append(fd)
        if len(calls) == len(FILES):
            raise KeyboardInterrupt
        real_fsync(fd)

    monkeypatch.setattr(os, "fsync", interrupted_third)
    res = invoke(["report", "--before", before, "--after", after, "-o", out,
                  "--resamples", "50"])
    assert res.exit_code == 130 and "no output was written" in res.stderr
    assert {name: (out / name).read_bytes() for name in FILES} == previous
    assert sorted(p.name for p in out.iterdir()) == sorted(FILES)  # no temporaries


def test_report_output_that_is_a_file_is_named(tmp_path: Path,
                                               nbest_pair: tuple[Path, Path]) -> None:
    # it was "internal error (FileExistsError ...)"
    before, after = nbest_pair
    taken = tmp_path / "taken"
    taken.write_text("")
    res = invoke(["report", "--before", before, "--after", after, "-o", taken,
                  "--resamples", "50"])
    assert res.exit_code == 1
    assert res.stderr == f"error: {taken}: is a file, expected a folder for the report\n"
    res = invoke(["report", "--before", before, "--after", after, "-o", taken / "sub",
                  "--resamples", "50"])
    assert res.exit_code == 1
    assert res.stderr == (f"error: {taken / 'sub'}: cannot create the report folder "
                          "(Not a directory)\n")


def test_terms_option_adds_a_class(tmp_path: Path, nbest_pair: tuple[Path, Path]) -> None:
    terms = tmp_path / "terms.txt"
    terms.write_text("bay\n")
    res = invoke(["report", "--before", nbest_pair[0], "--after", nbest_pair[1],
                  "-o", tmp_path / "rep", "--resamples", "200", "--terms", terms])
    assert res.exit_code == 0, res.output
    data = json.loads((tmp_path / "rep" / "report.json").read_text())
    assert set(data["critical_words"]) == {"numbers", "negations", "terms"}
    assert str(terms) in data["provenance"]["data_sha256"]
    assert 'id="critical-words"' in (tmp_path / "rep" / "report.html").read_text()
    bad = tmp_path / "bad.txt"
    bad.write_text("...\n")
    res = invoke(["report", "--before", nbest_pair[0], "--after", nbest_pair[1],
                  "-o", tmp_path / "rep2", "--terms", bad])
    assert res.exit_code == 1
    assert res.stderr.strip() == (f"error: {bad}:1: term: no words left after "
                                  "normalisation in '...'")
    assert not (tmp_path / "rep2").exists()


def test_report_refuses_a_model_other_than_the_weights_were_tuned_with(
        tmp_path: Path, nbest_pair: tuple[Path, Path]) -> None:
    # as apply does: the weights file records the model's SHA-256; a different model given
    # with --lm is an error (exit 1, no report) unless --allow-other-model
    from rescore.lm import NGramModel, save_model

    model = tmp_path / "m.lm"
    save_model(NGramModel(2).fit([["bay", "one"], ["bay", "two"]]), model)
    weights = tmp_path / "weights.json"
    recorded = "0" * 64  # no file hashes to 64 zeros
    weights.write_text(json.dumps({
        "acoustic_scale": 1.0, "lm_weight": 0.5, "insertion_penalty": 0.0,
        "provenance": {"models": {"lm": {"path": "elsewhere.lm", "sha256": recorded}}}}))
    base = ["report", "--before", nbest_pair[0], "--after", nbest_pair[1],
            "--resamples", "50", "--weights", weights, "--lm", model]
    res = invoke([*base, "-o", tmp_path / "rep"])
    assert res.exit_code == 1
    assert res.stderr.startswith(f"error: {weights}: provenance.models.lm.sha256: ")
    assert recorded in res.stderr and sha256_file(model) in res.stderr
    assert "--allow-other-model" in res.stderr
    assert not (tmp_path / "rep").exists()
    res = invoke([*base, "-o", tmp_path / "rep2", "--allow-other-model"])
    assert res.exit_code == 0, res.output
    assert "(--allow-other-model)" in res.stderr
    assert (tmp_path / "rep2" / "report.json").is_file()
