"""The training-text fingerprint and the leakage check of report and check."""

from __future__ import annotations

import json
from pathlib import Path

import numpy as np
import pytest
import xxhash
from click.testing import Result
from typer.testing import CliRunner

from rescore.cli import app
from rescore.lm import NGramModel, load_model, read_corpus, save_model, store
from rescore.lm.fingerprint import fingerprint, sentence_hash, union
from rescore.lm.overlap import overlap
from rescore.text import tokens

ROOT = Path(__file__).resolve().parent.parent
DEMO = ROOT / "fixtures" / "demo"


def invoke(args: list[str | Path]) -> Result:
    return CliRunner().invoke(app, [str(a) for a in args], catch_exceptions=False)


def test_sentence_hash_is_xxh3_of_the_words_joined_by_one_space() -> None:
    # XXH3-64 of the UTF-8 bytes (the xxhash package is the reference implementation)
    assert sentence_hash(["pump", "two", "on"]) == xxhash.xxh3_64_intdigest(b"pump two on")
    assert sentence_hash(["caf\u00e9"]) == xxhash.xxh3_64_intdigest("caf\u00e9".encode())
    # the fingerprint is sorted and unique: a repeated sentence is stored once
    fp = fingerprint([["a", "b"], ["c"], ["a", "b"]])
    assert fp.dtype == np.uint64 and len(fp) == 2 and list(fp) == sorted(fp)


def test_fit_records_the_fingerprint_and_the_file_keeps_it(tmp_path: Path) -> None:
    text = [["pump", "on"], ["vent", "open"], ["pump", "on"]]
    model = NGramModel(order=2).fit(text)
    assert model.sentence_hashes is not None
    assert set(model.sentence_hashes.tolist()) == {sentence_hash(s) for s in text}
    path = tmp_path / "m.lm"
    save_model(model, path)
    back = load_model(path)
    assert back.sentence_hashes is not None
    assert np.array_equal(back.sentence_hashes, model.sentence_hashes)
    # the checksum covers the fingerprint and equals the one of the file
    assert back.checksum == model.checksum


def test_file_without_fingerprint_still_loads(tmp_path: Path) -> None:
    model = NGramModel(order=2).fit([["pump", "on"]])
    old = tmp_path / "old.lm"
    store.save(model.tables_, model.metadata_, old)  # as written before fingerprints
    with_fp = tmp_path / "new.lm"
    save_model(model, with_fp)
    # 2 distinct sentences... here one: 8 bytes plus its 64-byte alignment padding and
    # the directory entry in the header
    assert with_fp.stat().st_size > old.stat().st_size
    loaded = load_model(old)
    assert loaded.sentence_hashes is None
    assert overlap(loaded, [["pump", "on"]]) is None
    # an ARPA file has none either
    arpa = tmp_path / "m.arpa"
    save_model(model, arpa)
    assert load_model(arpa).sentence_hashes is None


def test_union_needs_every_part() -> None:
    a, b = fingerprint([["x"]]), fingerprint([["y"], ["x"]])
    both = union([a, b])
    assert both is not None and len(both) == 2
    assert union([a, None]) is None


def test_mix_carries_the_union(tmp_path: Path) -> None:
    from rescore.lm.mix import mix_models

    one = NGramModel(order=2).fit([["pump", "on"]])
    two = NGramModel(order=2).fit([["vent", "open"]])
    _, merged, _ = mix_models([one, two], None, weights=[0.5, 0.5])
    assert merged.sentence_hashes is not None
    assert set(merged.sentence_hashes.tolist()) == {sentence_hash(["pump", "on"]),
                                                    sentence_hash(["vent", "open"])}


def _test_refs() -> list[str]:
    return [json.loads(line)["reference"] for line in
            (DEMO / "test.jsonl").read_text().splitlines() if line.strip()]


@pytest.fixture
def models(tmp_path: Path) -> tuple[Path, Path]:
    clean, leaky = tmp_path / "clean.lm", tmp_path / "leaky.lm"
    train = DEMO / "train.txt"
    refs = tmp_path / "refs.txt"
    refs.write_text("\n".join(_test_refs()) + "\n")
    for out, texts in ((clean, [train]), (leaky, [train, refs])):
        res = invoke(["lm", "build", *texts, "--order", "3", "-o", out])
        assert res.exit_code == 0, res.output
    return clean, leaky


def test_report_and_check_find_the_leak(tmp_path: Path, models: tuple[Path, Path]) -> None:
    clean, leaky = models
    test = DEMO / "test.jsonl"
    n = len(_test_refs())
    for name, model, found in (("clean", clean, 0), ("leaky", leaky, n)):
        out = tmp_path / name
        res = invoke(["report", "--before", test, "--after", test, "-o", out,
                      "--resamples", "50", "--lm", model])
        assert res.exit_code == 0, res.output
        data = json.loads((out / "report.json").read_text())["overlap"]
        # the leaky LM was trained on every test reference: all are found (100 %)
        assert (data["references"], data["found"]) == (n, found)
        assert data["share"] == found / n
        assert ("are sentences of the language model's training text" in res.stderr) == bool(
            found)
        page = (out / "report.html").read_text()
        assert ('training text (more than 1%)' in page) == bool(found)
        md = (out / "report.md").read_text()
        assert md.startswith("# Release report") and (
            "> **Warning.** " + str(found) in md) == bool(found)
        # n-gram overlap: every trigram of a reference is in the leaky model
        assert data["models"][0]["ngram_order"] == 3
        if found:
            assert data["models"][0]["ngram_share"] == 1.0
        else:
            assert data["models"][0]["ngram_share"] < 1.0
        res = invoke(["check", test, "--lm", model, "--json"])
        assert res.exit_code == 0, res.output
        checked = json.loads(res.stdout)["overlap"]
        assert (checked["found"], checked["references"]) == (found, n)
        assert ("warning:" in res.stderr) == bool(found)


def test_threshold_is_settable(tmp_path: Path, models: tuple[Path, Path]) -> None:
    _, leaky = models
    res = invoke(["check", DEMO / "test.jsonl", "--lm", leaky, "--warn-overlap", "100%"])
    # 100 % found is not more than 100 %: no warning
    assert res.exit_code == 0 and "warning:" not in res.stderr
    res = invoke(["check", DEMO / "test.jsonl", "--lm", leaky, "--warn-overlap", "5"])
    assert res.exit_code == 2


def test_report_uses_the_models_the_weights_record(tmp_path: Path,
                                                   models: tuple[Path, Path]) -> None:
    from rescore.checksum import sha256_file

    _, leaky = models
    weights = tmp_path / "w.json"
    weights.write_text(json.dumps({
        "acoustic_scale": 1.0, "lm_weight": 1.0, "insertion_penalty": 0.0, "features": {},
        "provenance": {"models": {"lm": {"path": str(leaky), "sha256": sha256_file(leaky)}}}}))
    test = DEMO / "test.jsonl"
    res = invoke(["report", "--before", test, "--after", test, "-o", tmp_path / "r",
                  "--resamples", "50", "--weights", weights])
    assert res.exit_code == 0, res.output
    data = json.loads((tmp_path / "r" / "report.json").read_text())
    assert data["overlap"]["share"] == 1.0
    assert data["overlap"]["models"][0]["model"] == "lm"


def test_arpa_model_is_not_checked_and_says_so(tmp_path: Path) -> None:
    arpa = tmp_path / "m.arpa"
    res = invoke(["lm", "build", DEMO / "train.txt", "--order", "2", "-o", arpa])
    assert res.exit_code == 0, res.output
    res = invoke(["check", DEMO / "test.jsonl", "--lm", arpa, "--json"])
    assert res.exit_code == 0, res.output
    data = json.loads(res.stdout)["overlap"]
    assert data["unchecked"] == [str(arpa)] and data["models"] == [] and data["share"] is None
    assert f"warning: no training-text fingerprint in {arpa}" in res.stderr


def test_fingerprint_from_text_blocks_equals_the_one_from_word_lists(tmp_path: Path) -> None:
    # A model fitted on files reads them as clean blocks; one fitted on word lists sees the
    # sentences themselves. The fingerprint is defined on the sentences (each one's words
    # joined by one space), so both routes must give the same hashes, including for lines
    # whose spacing and punctuation normalisation changes, and for lines with no word.
    lines = ["Pump  ON, bay three!", "", "  vent  42 % open ", "-- ...", "pump on bay three"]
    path = tmp_path / "t.txt"
    path.write_text("\n".join(lines) + "\n", encoding="utf-8")
    from_blocks = NGramModel(order=2).fit(read_corpus([path]))
    from_lists = NGramModel(order=2).fit([tokens(x) for x in lines if tokens(x)])
    # lines 1 and 5 are one sentence: 2 distinct
    expected = fingerprint([tokens(x) for x in lines if tokens(x)])
    assert from_blocks.sentence_hashes is not None and from_lists.sentence_hashes is not None
    assert len(expected) == 2
    np.testing.assert_array_equal(from_blocks.sentence_hashes, expected)
    np.testing.assert_array_equal(from_lists.sentence_hashes, expected)
