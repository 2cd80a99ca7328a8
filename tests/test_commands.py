"""Command-line behaviour of the foundation commands: exit codes, stdout, stderr."""

from __future__ import annotations

import json
from pathlib import Path

import jiwer
import pytest

from tests.conftest import FIXTURES, run

TWO = FIXTURES / "nbest_two_utterances.jsonl"

# Jurafsky and Martin, Speech and Language Processing, 3rd ed. draft, speech recognition
# chapter, WER example: 13 reference words, 6 substitutions, 1 deletion, 3 insertions.
JM_REF = "i um the phone is i left the portable phone upstairs last night"
JM_HYP = "i got it to the fullest i love to portable form of stores last night"


def test_wer_textbook_example_through_the_command(tmp_path: Path) -> None:
    refs, hyps = tmp_path / "refs.tsv", tmp_path / "hyps.tsv"
    refs.write_text(f"jm-1\t{JM_REF}\n")
    hyps.write_text(f"jm-1\t{JM_HYP}\n")
    result = run(["wer", "--refs", refs, "--hyps", hyps, "--json"])
    assert result.exit_code == 0, result.stderr
    data = json.loads(result.stdout)
    assert data == {"wer": pytest.approx(10 / 13), "substitutions": 6, "deletions": 1,
                    "insertions": 3, "hits": 6, "reference_words": 13, "utterances": 1}


def test_wer_of_nbest_one_best_equals_jiwer() -> None:
    # jiwer is the reference implementation; corpus WER pools errors over all words
    result = run(["wer", TWO, "--json"])
    assert result.exit_code == 0, result.stderr
    refs = ["vent bay three opened to forty percent", "lamp bank four dimmed"]
    hyps = ["went bay three opened to forty percent", "lamp bank for dimmed"]
    assert json.loads(result.stdout)["wer"] == pytest.approx(jiwer.wer(refs, hyps))


def test_wer_counted_in_small_batches_equals_jiwer_over_the_whole_file() -> None:
    # source: jiwer.process_words over every utterance at once (reference library);
    # corpus WER pools the counts, so summing them batch by batch must change nothing
    from rescore.nbest import read_nbest
    from rescore.text import tokens

    demo = FIXTURES / "demo" / "test.jsonl"
    utts = list(read_nbest(demo))
    refs = [" ".join(tokens(u["reference"])) for u in utts]
    hyps = [" ".join(tokens(u["hypotheses"][u.get("best", 0)]["text"])) for u in utts]
    keep = [i for i, r in enumerate(refs) if r]  # jiwer refuses an empty reference
    assert len(keep) == len(refs)
    expected = jiwer.process_words(refs, hyps)
    result = run(["wer", demo, "--json", "--batch-size", "7"])
    assert result.exit_code == 0, result.stderr
    data = json.loads(result.stdout)
    assert (data["substitutions"], data["deletions"], data["insertions"], data["hits"]) == (
        expected.substitutions, expected.deletions, expected.insertions, expected.hits)
    assert data["wer"] == pytest.approx(expected.wer)
    assert data["utterances"] == len(utts)


def test_wer_table_prints_the_bootstrap_interval_of_per_utterance_errors() -> None:
    # per-utterance errors from jiwer.process_words (reference library), resampled over
    # utterances by the report's paired bootstrap (seed 0, 10,000 resamples): the command's
    # table shows the same interval, to the two decimals it prints
    import re

    import numpy as np

    from rescore.nbest import read_nbest
    from rescore.significance import paired_bootstrap
    from rescore.text import tokens

    demo = FIXTURES / "demo" / "test.jsonl"
    errors, words = [], []
    for u in read_nbest(demo):
        out = jiwer.process_words(" ".join(tokens(u["reference"])),
                                  " ".join(tokens(u["hypotheses"][0]["text"])))
        errors.append(out.substitutions + out.deletions + out.insertions)
        words.append(out.substitutions + out.deletions + out.hits)
    expected = paired_bootstrap(errors, errors, words, resamples=10_000, seed=0).before_ci
    result = run(["wer", demo])
    assert result.exit_code == 0, result.stderr
    shown = re.search(r"\[(\d+\.\d\d)%, (\d+\.\d\d)%\]", result.stdout)
    assert shown is not None, result.stdout
    assert [float(x) for x in shown.groups()] == [round(100 * v, 2) for v in expected]
    assert np.mean(errors) > 0  # a real spread to resample
    assert "10,000 resamples, seed 0" in result.stderr


def test_wer_table_is_printed() -> None:
    result = run(["wer", TWO])
    assert result.exit_code == 0
    assert "18.18%" in result.stdout  # 2 errors over 11 reference words


def test_wer_transcripts_missing_ids(tmp_path: Path) -> None:
    hyps = tmp_path / "hyps.tsv"
    hyps.write_text("lark-0001\tvent bay three\n")
    result = run(["wer", "--refs", FIXTURES / "refs_two_utterances.tsv", "--hyps", hyps])
    assert result.exit_code == 1
    assert "2 references for 1 transcripts; missing ids: lark-0002" in result.stderr


def test_wer_usage_error_exit_2() -> None:
    result = run(["wer"])
    assert result.exit_code == 2
    assert result.stderr.startswith("error: give either an N-best file")


def test_check_json_counts_and_oracle() -> None:
    result = run(["check", TWO, "--json"])
    assert result.exit_code == 0, result.stderr
    data = json.loads(result.stdout)
    # first hypotheses: 1 + 1 errors; best in list: 0 + 0; 11 reference words
    assert data["utterances"] == 2 and data["hypotheses"] == 5 and data["max_depth"] == 3
    assert data["one_best_wer"] == pytest.approx(2 / 11)
    assert data["oracle_wer"] == 0.0
    assert data["depths"] == {"2": 1, "3": 1}


def test_check_without_references_gives_null_wers() -> None:
    data = json.loads(run(["check", FIXTURES / "nbest_log10_costs.jsonl", "--json"]).stdout)
    assert data["one_best_wer"] is None and data["oracle_wer"] is None


def test_check_real_recognizer_sample_matches_its_readme(sample_dir: Path) -> None:
    # The sample README states: flite 1-best WER 0.174, oracle 0.091; espeak 0.523, 0.345.
    for name, one_best, oracle in (("warehouse_flite.jsonl", 0.174, 0.091),
                                   ("warehouse_espeak.jsonl", 0.523, 0.345)):
        data = json.loads(run(["check", sample_dir / name, "--json"]).stdout)
        assert data["one_best_wer"] == pytest.approx(one_best, abs=5e-4)
        assert data["oracle_wer"] == pytest.approx(oracle, abs=5e-4)


def test_apply_with_recognizer_weights_reproduces_its_choice(sample_dir: Path,
                                                             tmp_path: Path) -> None:
    # The sample README: LM weight 9.5 on first_pass_lm, filler_penalty weight 1 and a
    # word insertion penalty of -0.6296 nats reproduce the recognizer's first choice.
    weights = tmp_path / "recognizer.json"
    weights.write_text(json.dumps({"acoustic_scale": 1.0, "lm_weight": 0.0,
                                   "insertion_penalty": -0.6296,
                                   "features": {"first_pass_lm": 9.5, "filler_penalty": 1.0}}))
    for name in ("warehouse_flite.jsonl", "warehouse_espeak.jsonl"):
        out, tsv = tmp_path / f"{name}.out", tmp_path / f"{name}.tsv"
        result = run(["apply", sample_dir / name, "--weights", weights, "-o", out,
                      "--text", tsv])
        assert result.exit_code == 0, result.stderr
        records = [json.loads(line) for line in out.read_text().splitlines()]
        assert len(records) == 30 and all(r["best"] == 0 for r in records)
        assert all({"word_count", "total"} <= set(h) and "lm" not in h
                   for r in records for h in r["hypotheses"])
        first = [f"{r['id']}\t{r['hypotheses'][0]['text']}" for r in records]
        assert tsv.read_text().splitlines() == first


def test_apply_lm_weight_without_model_is_usage_error(tmp_path: Path) -> None:
    weights = tmp_path / "w.json"
    weights.write_text(json.dumps({"acoustic_scale": 1.0, "lm_weight": 0.5,
                                   "insertion_penalty": 0.0, "features": {}}))
    out = tmp_path / "out.jsonl"
    result = run(["apply", TWO, "--weights", weights, "-o", out])
    assert result.exit_code == 2
    assert "--lm: the weights give LM weight to lm but no such model was given" in result.stderr
    assert not out.exists()


def test_apply_malformed_input_leaves_no_output(tmp_path: Path) -> None:
    weights = tmp_path / "w.json"
    weights.write_text(json.dumps({"acoustic_scale": 1.0, "lm_weight": 0.0,
                                   "insertion_penalty": 0.0, "features": {}}))
    bad = tmp_path / "bad.jsonl"
    bad.write_text(TWO.read_text() + '{"id": "x", "hypotheses": [{"text": "a"}]}\n')
    out = tmp_path / "out.jsonl"
    result = run(["apply", bad, "--weights", weights, "-o", out, "--text", tmp_path / "t.tsv"])
    assert result.exit_code == 1
    assert result.stderr.startswith(f"error: {bad}:4: hypotheses[0].acoustic: ")
    assert sorted(p.name for p in tmp_path.iterdir()) == ["bad.jsonl", "w.json"]


def test_tune_then_apply_on_the_demo_scenario(tmp_path: Path) -> None:
    # tuned weights must beat the recognizer's own first choice on dev (the point of tuning)
    demo = FIXTURES / "demo"
    model = tmp_path / "logbook.lm"
    assert run(["lm", "build", demo / "train.txt", "--order", "3", "-o", model]).exit_code == 0
    weights = tmp_path / "w.json"
    result = run(["tune", demo / "dev.jsonl", "--lm", model, "-o", weights, "--json",
                  "--folds", "3"])
    assert result.exit_code == 0, result.stderr
    data = json.loads(result.stdout)
    assert {"lm_weight", "insertion_penalty", "features", "dev_errors", "dev_wer",
            "one_best_wer", "oracle_wer", "search"} <= set(data)
    assert data["oracle_wer"] <= data["dev_wer"] < data["one_best_wer"]
    out = tmp_path / "test.out.jsonl"
    assert run(["apply", demo / "test.jsonl", "--lm", model, "--weights", weights,
                "-o", out]).exit_code == 0
    after = json.loads(run(["wer", out, "--json"]).stdout)["wer"]
    before = json.loads(run(["wer", demo / "test.jsonl", "--json"]).stdout)["wer"]
    assert after < before


def test_verbose_logs_to_stderr_only(tmp_path: Path) -> None:
    import logging

    weights = tmp_path / "w.json"
    weights.write_text(json.dumps({"acoustic_scale": 1.0, "lm_weight": 0.0,
                                   "insertion_penalty": 0.0, "features": {}}))
    try:
        result = run(["--verbose", "apply", TWO, "--weights", weights, "-o", tmp_path / "o"])
    finally:
        root = logging.getLogger()
        for handler in list(root.handlers):
            root.removeHandler(handler)
    assert result.exit_code == 0
    # stdout holds the WER table alone (the records carry references); the log is on stderr
    assert "rescore.pipeline" not in result.stdout and "WER before and after" in result.stdout
    assert "rescore.pipeline: rescored lines 1-3 (2 utterances so far)" in result.stderr


# ---------------------------------------------------------------- tune: cross-validation


@pytest.fixture(scope="module")
def demo_lm(tmp_path_factory: pytest.TempPathFactory) -> Path:
    model = tmp_path_factory.mktemp("tune-lm") / "logbook.lm"
    built = run(["lm", "build", FIXTURES / "demo" / "train.txt", "--order", "3", "-o", model])
    assert built.exit_code == 0, built.stderr
    return model


def _row(table: str, label: str) -> str:
    return next(line for line in table.splitlines() if line.startswith(label))


def test_tune_reports_the_cross_validated_wer(demo_lm: Path, tmp_path: Path) -> None:
    dev = FIXTURES / "demo" / "dev.jsonl"
    analysis = tmp_path / "tuning.json"
    shown = run(["tune", dev, "--lm", demo_lm, "-o", tmp_path / "w.json",
                 "--analysis", analysis])
    assert shown.exit_code == 0, shown.stderr
    cv = json.loads(analysis.read_text())["cv"]
    # k-fold cross-validation pools the held-out errors of all folds over all reference
    # words (common practice; Hastie, Tibshirani and Friedman, Elements of Statistical
    # Learning, 2nd ed., section 7.10, from memory), so the figure is their ratio
    assert cv["k"] == 5 and cv["errors"] == sum(f["errors"] for f in cv["folds"])
    assert cv["wer"] == cv["errors"] / cv["reference_words"]
    # every dev word is held out exactly once: the folds cover the reference words that
    # `wer` counts on the same file
    dev_words = json.loads(run(["wer", dev, "--json"]).stdout)["reference_words"]
    assert cv["reference_words"] == dev_words
    printed = json.loads(run(["tune", dev, "--lm", demo_lm, "-o", tmp_path / "w2.json",
                              "--json"]).stdout)
    assert isinstance(printed["cv_wer"], float) and printed["cv_wer"] == cv["wer"]
    assert printed["cv_gap"] == pytest.approx(cv["wer"] - printed["dev_wer"], abs=1e-15)
    # the table shows the same figure as a percentage, and the gap to the dev WER in points
    assert _row(shown.stdout, "cross-validated WER").split()[-1] == f"{100 * cv['wer']:.2f}%"
    gap = 100 * (cv["wer"] - printed["dev_wer"])
    assert _row(shown.stdout, "cross-validated - dev").split()[-2] == f"{gap:+.2f}"


def test_tune_without_folds_shows_no_cv_figure(demo_lm: Path, tmp_path: Path) -> None:
    dev = FIXTURES / "demo" / "dev.jsonl"
    shown = run(["tune", dev, "--lm", demo_lm, "-o", tmp_path / "w.json", "--folds", "0"])
    assert shown.exit_code == 0, shown.stderr
    assert _row(shown.stdout, "cross-validated WER").split()[-1] == "-"
    printed = json.loads(run(["tune", dev, "--lm", demo_lm, "-o", tmp_path / "w.json",
                              "--folds", "0", "--json"]).stdout)
    assert printed["cv_wer"] is None and printed["cv_warning"] is None


def test_tune_cv_warning_follows_warn_cv_gap(sample_dir: Path, tmp_path: Path) -> None:
    # 30 utterances (the sample's README) and three tuned weights: few utterances per
    # weight, the classic set-up for over-fitting, so the held-out WER can lie above the
    # dev WER; the gap is measured first and the thresholds are placed around it
    nbest = sample_dir / "warehouse_espeak.jsonl"
    base = ["-q", "tune", nbest, "--feature", "first_pass_lm", "--feature", "filler_penalty",
            "-o", tmp_path / "w.json"]
    data = json.loads(run([*base, "--json", "--warn-cv-gap", "100%"]).stdout)
    gap_points = 100 * abs(data["cv_wer"] - data["dev_wer"])
    assert data["cv_warning"] is None and gap_points > 1.0
    # the default threshold is one point (as the README's tuning section documents)
    assert "warning: cross-validated WER" in run(base[1:]).stderr
    for points, warns in ((gap_points / 2, True), (gap_points * 2, False), (0.0, True)):
        # the same threshold as percentage points (N%) and as a fraction, as the gates take it
        for given in (f"{points:.6f}%", f"{points / 100:.8f}"):
            result = run([*base[1:], "--warn-cv-gap", given])
            assert result.exit_code == 0, result.stderr
            assert ("warning: cross-validated WER" in result.stderr) == warns, given
            printed = json.loads(run([*base, "--json", "--warn-cv-gap", given]).stdout)
            assert (printed["cv_warning"] is not None) == warns, given


def test_tune_warn_cv_gap_says_how_an_old_bare_number_is_read(tmp_path: Path) -> None:
    # "2" once meant two points; as a fraction it is 200 points, and one line says so
    result = run(["tune", TWO, "-o", tmp_path / "w.json", "--warn-cv-gap", "2"])
    assert result.exit_code == 2 and "expected a percentage" in result.stderr
    result = run(["tune", TWO, "-o", tmp_path / "w.json", "--folds", "0",
                  "--warn-cv-gap", "0.5"])
    assert result.exit_code == 0, result.stderr
    assert "--warn-cv-gap 0.5 is read as a fraction (50 points); for percentage points " \
        "write 0.5%" in result.stderr


def test_tune_warn_cv_gap_must_not_be_negative(tmp_path: Path) -> None:
    result = run(["tune", TWO, "-o", tmp_path / "w.json", "--warn-cv-gap", "-1"])
    assert result.exit_code == 2
    assert not (tmp_path / "w.json").exists()


def test_tune_widens_a_narrow_grid_and_warns_with_no_widen(demo_lm: Path,
                                                            tmp_path: Path) -> None:
    dev = FIXTURES / "demo" / "dev.jsonl"
    exact = json.loads(run(["tune", dev, "--lm", demo_lm, "-o", tmp_path / "w.json",
                            "--folds", "0", "--search", "exact", "--json"]).stdout)
    # measured: the exact search puts the demo's penalty well above 0 (about 30), so a grid
    # of -top..top with top a quarter of it is too narrow
    top = exact["insertion_penalty"] / 4
    assert top > 2
    fixed = run(["tune", dev, "--lm", demo_lm, "-o", tmp_path / "w2.json", "--folds", "0",
                 "--grid-penalty", f"{-top}:{top}:5", "--no-widen", "--json"])
    assert fixed.exit_code == 0, fixed.stderr
    data = json.loads(fixed.stdout)
    # derived: the error surface is lowest beyond the narrow grid, so its fewest-errors
    # region lies on the top edge; --no-widen keeps the grid and tells the user to widen it
    assert data["insertion_penalty"] == pytest.approx(top) and data["widenings"] == []
    assert "--grid-penalty" in data["edge_warning"] and "--no-widen" in data["edge_warning"]
    assert "warning: the fewest-errors region touches the grid's" in fixed.stderr
    assert "highest penalty" in data["edge_warning"]
    widened = run(["tune", dev, "--lm", demo_lm, "-o", tmp_path / "w3.json", "--folds", "0",
                   "--grid-penalty", f"{-top}:{top}:5", "--json"])
    assert widened.exit_code == 0, widened.stderr
    data = json.loads(widened.stdout)
    steps = data["widenings"]
    # each widening adds half the span (2 of the 4 steps) at the top, in the grid's step
    # (README, tuning section): 5 points, then 7, 9, ... up to the documented maximum of 4
    assert 1 <= len(steps) <= 4 and "penalty_high" in steps[0]["sides"]
    assert steps[0]["penalty_grid"] == pytest.approx([-top, 2 * top, 7])
    assert data["insertion_penalty"] > top
    assert data["dev_errors"] < json.loads(fixed.stdout)["dev_errors"]
    assert "grid widened to" in widened.stderr


def test_region_edges_rules() -> None:
    import numpy as np

    from rescore.tune import grid_edge_warning, region_edges

    lm, pen = np.linspace(0, 30, 4), np.linspace(-20, 20, 5)
    errors = np.full((4, 5), 9)
    # LM weight 0 means "no LM", a natural lower end: never an edge (README, tuning section)
    errors[0, 2] = 1
    assert region_edges(errors, lm, pen) == ()
    assert region_edges(errors, lm + 5, pen) == ("lm_low",)
    # any cell of the fewest-errors region counts, not only the chosen one: a region from
    # the middle to the top penalty touches the top edge
    errors[1:3, 2:] = 1
    assert region_edges(errors, lm, pen) == ("penalty_high",)
    assert "--grid-penalty" in (grid_edge_warning(region_edges(errors, lm, pen)) or "")
    assert grid_edge_warning(()) is None
    # a one-point axis has no edges
    assert region_edges(np.array([[1, 1, 1]]), np.array([3.0]), np.linspace(0, 2, 3)) == (
        "penalty_low", "penalty_high")
    assert region_edges(np.array([[1], [1]]), lm[:2], np.array([3.0])) == ("lm_high",)


# --- hostile or mistaken paths and empty inputs (reliability audit) ---------------------
# Contract, exit codes: 1 is bad input or data, with one "error:" line and no output file.
# A path that names the wrong kind of thing is bad input, as a missing input file is.

def _weights_file(folder: Path) -> Path:
    weights = folder / "w.json"
    weights.write_text(json.dumps({"acoustic_scale": 1.0, "lm_weight": 0.0,
                                   "insertion_penalty": 0.0, "features": {}}))
    return weights


def test_output_that_is_a_folder_is_named(tmp_path: Path, monkeypatch: pytest.MonkeyPatch
                                          ) -> None:
    # it was "internal error (IsADirectoryError ...)" after the whole run
    monkeypatch.chdir(tmp_path)
    (tmp_path / "adir").mkdir()
    weights = _weights_file(tmp_path)
    result = run(["apply", TWO, "--weights", weights, "-o", "adir"])
    assert result.exit_code == 1
    assert result.stderr == "error: adir: is a folder, expected a file path\n"
    assert sorted(p.name for p in tmp_path.iterdir()) == ["adir", "w.json"]  # no temporary
    assert list((tmp_path / "adir").iterdir()) == []


@pytest.mark.parametrize("args", [
    ["--text", "adir", "-o", "out.jsonl"],  # the second output of the same command
    ["-o", "adir", "--workers", "2"],  # the parallel path joins into it
])
def test_any_output_that_is_a_folder_is_named(tmp_path: Path, monkeypatch: pytest.MonkeyPatch,
                                              args: list[str]) -> None:
    monkeypatch.chdir(tmp_path)
    (tmp_path / "adir").mkdir()
    result = run(["apply", TWO, "--weights", _weights_file(tmp_path), *args])
    assert result.exit_code == 1
    assert result.stderr == "error: adir: is a folder, expected a file path\n"
    assert sorted(p.name for p in tmp_path.iterdir()) == ["adir", "w.json"]


def test_model_path_that_is_a_folder_is_named(tmp_path: Path) -> None:
    # it said "model file not found", which sends the user looking for a missing file
    folder = tmp_path / "adir"
    folder.mkdir()
    result = run(["apply", TWO, "--weights", _weights_file(tmp_path), "--lm", folder,
                  "-o", tmp_path / "out.jsonl"])
    assert result.exit_code == 1
    assert result.stderr == f"error: {folder}: is a folder, expected a model file\n"
    assert not (tmp_path / "out.jsonl").exists()


@pytest.mark.parametrize("content", ["", "\n\n", '{"nbest_header": {"log_base": 10}}\n'])
@pytest.mark.parametrize("workers", ["1", "2"])
def test_apply_refuses_a_file_without_utterances(tmp_path: Path, content: str,
                                                 workers: str) -> None:
    # check and wer refuse such a file; apply said "rescored 0 utterances" and exited 0
    empty = tmp_path / "empty.jsonl"
    empty.write_text(content)
    weights = _weights_file(tmp_path)
    result = run(["apply", empty, "--weights", weights, "-o", tmp_path / "out.jsonl",
                  "--text", tmp_path / "out.tsv", "--workers", workers])
    assert result.exit_code == 1
    assert result.stderr == f"error: {empty}: no utterances in the file\n"
    assert sorted(p.name for p in tmp_path.iterdir()) == ["empty.jsonl", "w.json"]
    for command in (["check", empty], ["wer", empty]):  # the same refusal everywhere
        assert run(command).stderr == f"error: {empty}: no utterances in the file\n"


@pytest.mark.parametrize("content", ["", "\n  \n", "... !!! ,,,\n"])
def test_lm_build_refuses_text_without_sentences(tmp_path: Path, content: str) -> None:
    # it wrote a model of three special tokens and exited 0
    empty = tmp_path / "empty.txt"
    empty.write_text(content)
    result = run(["lm", "build", empty, "-o", tmp_path / "m.lm"])
    assert result.exit_code == 1
    assert result.stderr == (f"error: {empty}: no sentences (every line is blank or has no "
                             "words)\n")
    assert sorted(p.name for p in tmp_path.iterdir()) == ["empty.txt"]


@pytest.mark.parametrize("command", ["tune", "lm build", "lm mix"])
def test_output_that_is_a_folder_is_refused_before_the_work(
        tmp_path: Path, command: str, demo_lm: Path, monkeypatch: pytest.MonkeyPatch) -> None:
    # the contract: bad input exits 1 with one line; refusing the output path first spares
    # the user the whole build or search before the same refusal (the work is made to fail
    # loudly here, so the test tells "before" from "after")
    from rescore import pipeline
    from rescore.lm import NGramModel, mix

    def started(*args: object, **kwargs: object) -> None:
        raise AssertionError("the work started")

    monkeypatch.setattr(pipeline, "tune_file", started)
    monkeypatch.setattr(NGramModel, "fit", started)
    monkeypatch.setattr(mix, "mix_models", started)
    folder = tmp_path / "adir"
    folder.mkdir()
    demo = FIXTURES / "demo"
    args = {"tune": ["tune", demo / "dev.jsonl", "--lm", demo_lm, "-o", folder],
            "lm build": ["lm", "build", demo / "dev.txt", "-o", folder],
            "lm mix": ["lm", "mix", demo_lm, demo_lm, "--fixed-weights", "0.5,0.5", "-o", folder]}
    result = run(args[command])
    assert result.exit_code == 1
    assert result.stderr == f"error: {folder}: is a folder, expected a file path\n"
    assert "Traceback" not in result.stderr


def test_apply_prints_wer_before_and_after_when_references_exist(demo_lm: Path,
                                                                tmp_path: Path) -> None:
    # the figures apply prints are the ones wer prints of its input (the recognizer's
    # 1-best) and of its output: one measurement, two routes
    test = FIXTURES / "demo" / "test.jsonl"
    weights = tmp_path / "w.json"
    weights.write_text('{"acoustic_scale": 1, "lm_weight": 9, "insertion_penalty": 2}')
    out = tmp_path / "out.jsonl"
    result = run(["apply", test, "--lm", demo_lm, "--weights", weights, "-o", out, "--json"])
    assert result.exit_code == 0, result.stderr
    data = json.loads(result.stdout)
    assert data["before"] == json.loads(run(["wer", test, "--json"]).stdout)
    assert data["after"] == json.loads(run(["wer", out, "--json"]).stdout)
    assert data["after"]["wer"] < data["before"]["wer"] and data["utterances"] == 500
    shown = run(["apply", test, "--lm", demo_lm, "--weights", weights, "-o", out]).stdout
    assert "before" in shown and "after" in shown and "95% interval" in shown
    # without references there is nothing to score: no table, nulls in the JSON
    bare = tmp_path / "bare.jsonl"
    bare.write_text("".join(json.dumps({k: v for k, v in json.loads(line).items()
                                        if k != "reference"}) + "\n"
                            for line in test.read_text().splitlines()[:5]))
    quiet = run(["apply", bare, "--lm", demo_lm, "--weights", weights, "-o", out, "--json"])
    assert json.loads(quiet.stdout)["before"] is None
    assert run(["apply", bare, "--weights", weights, "--lm", demo_lm, "-o", "-",
                "--json"]).exit_code == 2


def test_apply_no_wer_skips_the_second_pass(demo_lm: Path, tmp_path: Path) -> None:
    weights = tmp_path / "w.json"
    weights.write_text('{"acoustic_scale": 1, "lm_weight": 9, "insertion_penalty": 2}')
    res = run(["apply", FIXTURES / "demo" / "test.jsonl", "--lm", demo_lm, "--weights",
               weights, "-o", tmp_path / "o.jsonl", "--no-wer", "--json"])
    assert res.exit_code == 0 and json.loads(res.stdout)["after"] is None
