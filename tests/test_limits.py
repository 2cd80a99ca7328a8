"""Limits on hostile input: every cap is one line on stderr, exit 1, no output file.

The cases come from the reliability audit: 50,000 tab-separated words passed the words cap
(it counted spaces only), and a 10 MB string passed in any field. The expected form of each
message is the contract's (CONTRACT.md, exit codes): ``error: PATH:LINE: FIELD: message``.
"""

from __future__ import annotations

import json
from pathlib import Path

import pytest
from click.testing import Result

from rescore.limits import ANALYSIS_FILE_LIMIT, TEXT_LINE_LIMIT, WEIGHTS_FILE_LIMIT
from rescore.nbest import DEFAULT_LIMITS
from tests.conftest import run

GOOD = {"id": "u1", "reference": "row two", "hypotheses": [{"text": "row two", "acoustic": -1.0}]}
WEIGHTS = {"acoustic_scale": 1.0, "lm_weight": 0.0, "insertion_penalty": 0.0, "features": {}}


def _nbest(folder: Path, record: dict[str, object] | str) -> Path:
    """A file whose second line is ``record`` (the first is a good utterance)."""
    path = folder / "hostile.jsonl"
    line = record if isinstance(record, str) else json.dumps(record)
    path.write_text(json.dumps(GOOD) + "\n" + line + "\n")
    return path


def _apply(folder: Path, nbest: Path) -> Result:
    weights = folder / "w.json"
    weights.write_text(json.dumps(WEIGHTS))
    return run(["apply", nbest, "--weights", weights, "-o", folder / "out.jsonl",
                "--text", folder / "out.tsv"])


def _refused(result: Result, start: str, folder: Path, inputs: set[str]) -> None:
    assert result.exit_code == 1, result.stderr
    assert result.stderr.startswith(f"error: {start}"), result.stderr[:300]
    assert result.stderr.count("\n") == 1 and "Traceback" not in result.stderr
    assert {p.name for p in folder.iterdir()} == inputs  # no output, no temporary


def _words(separator: str, n: int) -> dict[str, object]:
    return {"id": "u2", "hypotheses": [{"text": separator.join(["w"] * n), "acoustic": -1.0}]}


@pytest.mark.parametrize(("separator", "n"), [
    (" ", DEFAULT_LIMITS.max_words + 1),  # one word over the cap
    ("\t", 50_000),  # the audit's case: tabs were not counted
    ("\u3000", 5_000),  # ideographic space (Unicode category Zs)
    ("\u2003", 5_000),  # em space (Zs)
    ("\u00a0", 5_000),  # no-break space (Zs): str.split splits on it, and so do we
    ("\u2028", 5_000),  # line separator (Zl): a JSON string may hold it raw
    ("\n", 5_000),  # an escaped newline inside the JSON string
    (",", 5_000),  # punctuation becomes a space when normalised, so it separates words
])
def test_words_cap_counts_words_as_normalisation_splits_them(tmp_path: Path, separator: str,
                                                             n: int) -> None:
    nbest = _nbest(tmp_path, _words(separator, n))
    result = _apply(tmp_path, nbest)
    _refused(result, f"{nbest}:2: hypotheses[0].text: more than the limit of 2000 words",
             tmp_path, {"hostile.jsonl", "w.json"})


def test_words_cap_keeps_a_long_hypothesis_within_it(tmp_path: Path) -> None:
    # exactly at the cap, tab-separated: accepted (the cap is "more than")
    nbest = _nbest(tmp_path, _words("\t", DEFAULT_LIMITS.max_words) | {"reference": "w"})
    assert _apply(tmp_path, nbest).exit_code == 0


def test_hypotheses_cap(tmp_path: Path) -> None:
    hyps = [{"text": "a", "acoustic": -1.0}] * (DEFAULT_LIMITS.max_hypotheses + 1)
    nbest = _nbest(tmp_path, {"id": "u2", "hypotheses": hyps})
    _refused(_apply(tmp_path, nbest),
             f"{nbest}:2: hypotheses: 10001 hypotheses, more than the limit of 10000",
             tmp_path, {"hostile.jsonl", "w.json"})


def test_line_length_cap(tmp_path: Path) -> None:
    # a sparse file: one line of NUL bytes just over the cap, costing no disk
    nbest = tmp_path / "hostile.jsonl"
    with open(nbest, "wb") as fh:
        fh.truncate(DEFAULT_LIMITS.max_line_bytes + 10)
    _refused(_apply(tmp_path, nbest), f"{nbest}:1: line longer than the limit of 64 MiB",
             tmp_path, {"hostile.jsonl", "w.json"})


def test_deeply_nested_value(tmp_path: Path) -> None:
    deep = "[" * 100_000 + "]" * 100_000
    nbest = _nbest(tmp_path, '{"id": "u2", "hypotheses": [{"text": "a", "acoustic": -1.0}], '
                             f'"meta": {{"x": {deep}}}}}')
    _refused(_apply(tmp_path, nbest), f"{nbest}:2: json: Invalid JSON: recursion limit",
             tmp_path, {"hostile.jsonl", "w.json"})


@pytest.mark.parametrize("field", ["hypotheses[0].text", "reference", "id"])
def test_huge_string_value(tmp_path: Path, field: str) -> None:
    huge = "x" * 10_000_000  # 10 MB: within the line cap, far over any real field
    record: dict[str, object] = json.loads(json.dumps(GOOD)) | {"id": "u2"}
    if field == "id":
        record["id"] = huge
    elif field == "reference":
        record["reference"] = huge
    else:
        record["hypotheses"] = [{"text": huge, "acoustic": -1.0}]
    nbest = _nbest(tmp_path, record)
    _refused(_apply(tmp_path, nbest),
             f"{nbest}:2: {field}: 10000000 characters, more than the limit of 100000",
             tmp_path, {"hostile.jsonl", "w.json"})


# --- the other readers: one line of text, and JSON files read whole -----------------------

def _sparse(path: Path, size: int) -> Path:
    """A file of ``size`` NUL bytes and no line break: one over-long line, no disk used."""
    with open(path, "wb") as fh:
        fh.truncate(size)
    return path


def _model(folder: Path) -> Path:
    corpus = folder / "c.txt"
    corpus.write_text("pump two on\npump three off\n")
    model = folder / "m.lm"
    assert run(["lm", "build", corpus, "-o", model]).exit_code == 0
    return model


TWO = Path(__file__).resolve().parent.parent / "fixtures" / "nbest_two_utterances.jsonl"
OVER_TEXT_LINE = TEXT_LINE_LIMIT + 10


@pytest.mark.parametrize("reader", ["refs", "hyps", "corpus", "vocab", "perplexity", "arpa"])
def test_line_cap_on_every_line_reader(tmp_path: Path, reader: str) -> None:
    # Reliability audit: only N-best files had a line cap; a text file of one endless
    # line was read whole into memory by the other readers.
    name = {"arpa": "long.arpa", "refs": "long.tsv", "hyps": "long.tsv"}.get(reader,
                                                                             "long.txt")
    long = _sparse(tmp_path / name, OVER_TEXT_LINE)
    refs = tmp_path / "refs.tsv"
    refs.write_text("u1\trow two\n")
    inputs = {p.name for p in tmp_path.iterdir()}
    out = tmp_path / "out.lm"
    if reader == "refs":
        result = run(["check", TWO, "--refs", long])
    elif reader == "hyps":
        result = run(["wer", "--refs", refs, "--hyps", long])
    elif reader == "corpus":
        result = run(["lm", "build", long, "-o", out])
    elif reader == "vocab":
        result = run(["lm", "build", refs, "--vocabulary", long, "-o", out])
    elif reader == "perplexity":
        model = _model(tmp_path)
        inputs |= {"c.txt", "m.lm"}
        result = run(["lm", "perplexity", model, long])
    else:
        result = run(["lm", "convert", long, out])
    # ARPA lines are a few words and numbers, so that reader has its own tighter cap
    limit = "1 MiB" if reader == "arpa" else "8 MiB"
    _refused(result, f"{long}:1: line longer than the limit of {limit}", tmp_path, inputs)


def test_line_cap_leaves_ordinary_long_lines_alone(tmp_path: Path) -> None:
    # a 1 MB reference line is long but legitimate: read, not refused
    refs = tmp_path / "refs.tsv"
    refs.write_text("lark-0001\t" + "vent " * 200_000 + "\nlark-0002\tlamp bank four dimmed\n")
    result = run(["check", TWO, "--refs", refs, "--json"])
    assert result.exit_code == 0, result.stderr


def test_size_cap_on_weights_file(tmp_path: Path) -> None:
    weights = _sparse(tmp_path / "w.json", WEIGHTS_FILE_LIMIT + 1)
    result = run(["apply", TWO, "--weights", weights, "-o", tmp_path / "out.jsonl"])
    _refused(result, f"{weights}: larger than the limit of 16 MiB for this file", tmp_path,
             {"w.json"})


def test_size_cap_on_tuning_analysis_file(tmp_path: Path) -> None:
    tuning = _sparse(tmp_path / "tuning.json", ANALYSIS_FILE_LIMIT + 1)
    result = run(["report", "--before", TWO, "--after", TWO, "--tuning", tuning,
                  "-o", tmp_path / "rep"])
    _refused(result, f"{tuning}: larger than the limit of 64 MiB for this file", tmp_path,
             {"tuning.json"})


def test_weights_file_with_bad_utf8_reports_byte_offset(tmp_path: Path) -> None:
    # Reliability audit: this reader said "position 68" where every other says "byte offset"
    weights = tmp_path / "w.json"
    first = b'{"acoustic_scale": 1.0, "lm_weight": 0.0, "insertion_penalty": 0.0,\n'
    weights.write_bytes(first + b' "features": {"caf\xe9": 1.0}}\n')
    offset = len(first) + len(b' "features": {"caf')
    result = run(["apply", TWO, "--weights", weights, "-o", tmp_path / "out.jsonl"])
    _refused(result, f"{weights}:2: invalid UTF-8 byte 0xe9 at byte offset {offset}",
             tmp_path, {"w.json"})


def test_tuning_file_with_bad_utf8_reports_byte_offset(tmp_path: Path) -> None:
    tuning = tmp_path / "tuning.json"
    data = b'{\n"surface": "\xff"}\n'
    tuning.write_bytes(data)
    offset = data.index(b"\xff")  # the byte offset is the bad byte's index in the file
    result = run(["report", "--before", TWO, "--after", TWO, "--tuning", tuning,
                  "-o", tmp_path / "rep"])
    _refused(result, f"{tuning}:2: invalid UTF-8 byte 0xff at byte offset {offset}", tmp_path,
             {"tuning.json"})


DEEP = "[" * 100_000 + "]" * 100_000


def test_deeply_nested_weights_file(tmp_path: Path) -> None:
    # Reliability audit: this gave "internal error (RecursionError ...)"
    weights = tmp_path / "w.json"
    weights.write_text('{"acoustic_scale": 1.0,\n "provenance": {"x": ' + DEEP + "}}\n")
    result = run(["apply", TWO, "--weights", weights, "-o", tmp_path / "out.jsonl"])
    _refused(result, f"{weights}:2: json: JSON nested more than 100 levels deep", tmp_path,
             {"w.json"})


def test_deeply_nested_tuning_file(tmp_path: Path) -> None:
    tuning = tmp_path / "tuning.json"
    tuning.write_text(DEEP)
    result = run(["report", "--before", TWO, "--after", TWO, "--tuning", tuning,
                  "-o", tmp_path / "rep"])
    _refused(result, f"{tuning}:1: json: JSON nested more than 100 levels deep", tmp_path,
             {"tuning.json"})


def test_nbest_lines_keep_their_own_larger_cap(tmp_path: Path) -> None:
    # an N-best line may be longer than a text line (many hypotheses); the readers that
    # look at N-best files again (duplicate ids, the report's file-type sniffing) must not
    # apply the smaller text cap to it
    big = {"id": "a", "reference": "row two", "hypotheses": [{"text": "row two",
                                                               "acoustic": -1.0}],
           "meta": {"note": "x" * (TEXT_LINE_LIMIT + 1000)}}
    nbest = tmp_path / "big.jsonl"
    nbest.write_text(json.dumps(big) + "\n" + json.dumps(big | {"meta": {}}) + "\n")
    result = run(["check", nbest])
    _refused(result, f"{nbest}:2: id: duplicate id 'a' (first on line 1)", tmp_path,
             {"big.jsonl"})
    nbest.write_text(json.dumps(big) + "\n")
    result = run(["report", "--before", nbest, "--after", nbest, "-o", tmp_path / "rep",
                  "--resamples", "10"])
    assert result.exit_code == 0, result.stderr


def test_deepest_nesting_the_reader_accepts_can_be_written_back(tmp_path: Path) -> None:
    # the reader's nesting limit (pydantic-core's parser, about 200 levels) must stay below
    # the writer's (orjson has its own, about 255 levels: both measured here, not promised),
    # or apply would read a record it cannot write and fail with an internal error
    from rescore.errors import InputError
    from rescore.nbest import RecordParser

    parser = RecordParser("probe.jsonl")

    def line(depth: int) -> str:
        return ('{"id": "u2", "reference": "a", "hypotheses": [{"text": "a", '
                f'"acoustic": -1.0}}], "meta": {{"x": {"[" * depth}{"]" * depth}}}}}')

    deepest = 0
    for depth in range(1, 300):
        try:
            parser.parse(2, line(depth))
        except InputError:
            break
        deepest = depth
    assert 0 < deepest < 299
    nbest = _nbest(tmp_path, line(deepest))
    result = _apply(tmp_path, nbest)
    assert result.exit_code == 0, result.stderr
