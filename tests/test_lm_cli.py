"""``rescore lm`` through typer's CliRunner: exit codes, stdout JSON, one-line errors."""

from __future__ import annotations

import json
import math
from pathlib import Path

import pytest
from typer.testing import CliRunner

from rescore.cli import app
from tests.conftest import run

runner = CliRunner()

LOGBOOK = "Pump two on.\nPump three off\n\nVent bay three open to forty percent\n"


@pytest.fixture
def text(tmp_path: Path) -> Path:
    path = tmp_path / "logbook.txt"
    path.write_text(LOGBOOK)
    return path


def _run(*args: str) -> tuple[int, str, str]:
    result = runner.invoke(app, list(args))
    return result.exit_code, result.stdout, result.stderr


@pytest.mark.parametrize("method", ["mkn", "kn", "wb", "abs", "addk", "mle"])
def test_build_then_perplexity_json(text: Path, tmp_path: Path, method: str) -> None:
    model = tmp_path / "m.lm"
    code, _, err = _run("lm", "build", str(text), "--order", "3", "--method", method,
                        "-o", str(model))
    assert code == 0, err
    code, out, err = _run("lm", "perplexity", str(model), str(text), "--json")
    assert code == 0, err
    data = json.loads(out)
    assert {"perplexity", "log10_prob", "sentences", "tokens", "oov"} <= set(data)
    # contract: tokens count each </s> and never <s>: 3 + 3 + 7 words, 3 sentences
    assert data["sentences"] == 3 and data["tokens"] == 16 and data["oov"] == 0
    assert data["perplexity"] == pytest.approx(10 ** (-data["log10_prob"] / data["tokens"]))


def test_perplexity_table_shows_oov_rate(text: Path, tmp_path: Path) -> None:
    model = tmp_path / "m.lm"
    assert _run("lm", "build", str(text), "-o", str(model))[0] == 0
    probe = tmp_path / "probe.txt"
    probe.write_text("pump four on\n")
    code, out, _ = _run("lm", "perplexity", str(model), str(probe))
    assert code == 0
    assert "OOV rate" in out and "33.33%" in out  # one word in three


def test_unknown_method_is_one_line_usage_error(text: Path, tmp_path: Path) -> None:
    code, _, err = _run("lm", "build", str(text), "-m", "kneser", "-o", str(tmp_path / "m"))
    assert code == 2
    assert err == "error: unknown method 'kneser'; expected one of mkn, kn, wb, abs, addk, mle\n"
    assert not (tmp_path / "m").exists()


def test_missing_text_is_input_error(tmp_path: Path) -> None:
    code, _, err = _run("lm", "build", str(tmp_path / "none.txt"), "-o", str(tmp_path / "m"))
    assert code == 1
    assert err.count("\n") == 1 and "none.txt: file not found" in err


def test_bad_utf8_names_the_line(tmp_path: Path) -> None:
    bad = tmp_path / "bad.txt"
    bad.write_bytes(b"pump on\nvent \xff open\n")
    code, _, err = _run("lm", "build", str(bad), "-o", str(tmp_path / "m"))
    assert code == 1 and err.startswith(f"error: {bad}:2: invalid UTF-8")


def test_damaged_model_is_one_line_error(text: Path, tmp_path: Path) -> None:
    model = tmp_path / "m.lm"
    assert _run("lm", "build", str(text), "-o", str(model))[0] == 0
    model.write_bytes(model.read_bytes()[:-5])
    code, _, err = _run("lm", "perplexity", str(model), str(text))
    assert code == 1 and err.count("\n") == 1 and "not a valid rescore model file" in err


def test_bad_cutoffs_and_options(text: Path, tmp_path: Path) -> None:
    out = str(tmp_path / "m")
    assert _run("lm", "build", str(text), "--min-ngram-counts", "1,x", "-o", out)[0] == 2
    assert _run("lm", "build", str(text), "--min-ngram-counts", "1", "-n", "3", "-o", out)[0] == 2
    assert _run("lm", "build", str(text), "--order", "9", "-o", out)[0] == 2
    assert _run("lm", "build", str(text), "--min-ngram-counts", "1,2", "--prune-entropy", "1e-6",
                "-o", out)[0] == 0


def test_vocab_file_and_closed_vocab(text: Path, tmp_path: Path) -> None:
    vocab = tmp_path / "vocab.txt"
    vocab.write_text("pump\ntwo\non\n")
    model = tmp_path / "m.lm"
    code, _, err = _run("lm", "build", str(text), "--vocabulary", str(vocab), "--no-unknown-word",
                        "-o", str(model))
    assert code == 0, err
    code, out, _ = _run("lm", "perplexity", str(model), str(text), "--json")
    data = json.loads(out)
    # 13 words, 9 outside {pump, two, on} (2 + 7); closed: they leave the count
    assert data["oov"] == 9 and data["tokens"] == 13 + 3 - 9


def test_pruned_arpa_model_reads_back(tmp_path: Path) -> None:
    # entropy pruning can leave positive log10 back-off weights, which are valid ARPA (from
    # memory); the ARPA file must score the text as the native file does (1e-6 log10 per
    # n-gram, the ARPA round-trip tolerance, so about 1e-6 relative in perplexity)
    import numpy as np

    rng = np.random.default_rng(0)
    p = 1.0 / np.arange(1, 26)  # Zipf's law for word frequencies (from memory)
    text = tmp_path / "zipf.txt"
    text.write_text("".join(" ".join(f"w{j}" for j in rng.choice(25, rng.integers(1, 10),
                                                                  p=p / p.sum())) + "\n"
                            for _ in range(300)))
    outs = {}
    for name in ("p.arpa", "p.lm"):
        code, _, err = _run("lm", "build", str(text), "-n", "3", "-m", "wb",
                            "--prune-entropy", "1e-3", "-o", str(tmp_path / name))
        assert code == 0, err
        code, out, err = _run("lm", "perplexity", str(tmp_path / name), str(text), "--json")
        assert code == 0, err
        outs[name] = json.loads(out)
    assert any(float(x.split("\t")[2]) > 0 for x in (tmp_path / "p.arpa").read_text()
               .splitlines() if x.count("\t") == 2)
    assert outs["p.arpa"]["perplexity"] == pytest.approx(outs["p.lm"]["perplexity"], rel=1e-5)


def test_sentence_scores_file(text: Path, tmp_path: Path) -> None:
    model = tmp_path / "m.lm"
    assert _run("lm", "build", str(text), "-o", str(model))[0] == 0
    probe = tmp_path / "probe.txt"
    probe.write_text("Pump four on.\n\n  \nVent bay three open\n")
    scores = tmp_path / "scores.jsonl"
    code, out, err = _run("lm", "perplexity", str(model), str(probe), "--json",
                          "--per-sentence", str(scores))
    assert code == 0, err
    totals = json.loads(out)  # stdout stays one JSON object
    rows = [json.loads(x) for x in scores.read_text().splitlines()]
    # blank lines are skipped, so each row names its line; text is normalised (lowercase,
    # punctuation stripped: the contract's normalisation)
    assert [(r["line"], r["text"]) for r in rows] == [(1, "pump four on"),
                                                    (4, "vent bay three open")]
    assert [(r["words"], r["tokens"], r["oov"]) for r in rows] == [(3, 4, 1), (4, 5, 0)]
    # each row is the sum of its per-token values (chain rule), and the rows add up to the
    # totals (the contract's log10_prob and tokens)
    from rescore.lm import load_model

    per_token = load_model(model).token_logprobs([r["text"].split() for r in rows])
    for r, tok in zip(rows, per_token, strict=True):
        assert r["log10_prob"] == pytest.approx(float(tok.sum()) / math.log(10), abs=1e-12)
    assert sum(r["log10_prob"] for r in rows) == pytest.approx(totals["log10_prob"], abs=1e-9)
    assert sum(r["tokens"] for r in rows) == totals["tokens"] == 9
    # the same figures as a run without the option
    assert json.loads(_run("lm", "perplexity", str(model), str(probe), "--json")[1]) == totals


def test_sentence_scores_not_written_on_bad_input(text: Path, tmp_path: Path) -> None:
    model = tmp_path / "m.lm"
    assert _run("lm", "build", str(text), "-o", str(model))[0] == 0
    bad = tmp_path / "bad.txt"
    bad.write_bytes(b"pump on\nvent \xff open\n")
    scores = tmp_path / "scores.jsonl"
    code, _, err = _run("lm", "perplexity", str(model), str(bad), "--per-sentence",
                        str(scores))
    # bad input: one line naming file and line, and no half-written output (project rule)
    assert code == 1 and err.startswith(f"error: {bad}:2: invalid UTF-8")
    assert sorted(p.name for p in tmp_path.iterdir()) == ["bad.txt", "logbook.txt", "m.lm"]


def test_build_and_convert_print_json_with_lm_checks_keys(tmp_path: Path) -> None:
    # one key per quantity: --json of lm build and lm convert uses lm check's names for the
    # order, n-gram counts and bytes, and the numbers agree with lm check's own
    corpus = tmp_path / "train.txt"
    corpus.write_text("vent bay two opened\nvent bay three closed\nrow two misted\n")
    model = tmp_path / "m.lm"
    built = run(["lm", "build", corpus, "-o", model, "--json"])
    assert built.exit_code == 0, built.stderr
    data = json.loads(built.stdout)
    checked = json.loads(run(["lm", "check", model, "--json"]).stdout)
    for key in ("order", "ngrams", "bytes", "bytes_per_ngram"):
        assert data[key] == checked[key], key
    assert data["out"] == str(model) and data["method"] == "mkn"
    arpa = tmp_path / "m.arpa"
    converted = run(["lm", "convert", model, "-o", arpa, "--json"])
    assert converted.exit_code == 0, converted.stderr
    again = json.loads(converted.stdout)
    assert again["ngrams"] == data["ngrams"] and again["bytes"] == arpa.stat().st_size
    # the output once: as OUT or as -o, not both and not neither
    assert run(["lm", "convert", model, arpa, "-o", arpa]).exit_code == 2
    assert run(["lm", "convert", model]).exit_code == 2
