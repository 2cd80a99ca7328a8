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
    _refused(_apply(tmp_path, nbest), f"{nbest}:1: line longer than the limit of ",
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
