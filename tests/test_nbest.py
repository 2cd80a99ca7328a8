"""The N-best reader: the contract's format, conversions, and one-line errors for bad input."""

from __future__ import annotations

import gzip
import json
import math
import re
from pathlib import Path

import pytest

from rescore.errors import InputError
from rescore.nbest import iter_nbest, one_best, read_nbest, read_refs, write_nbest
from tests.conftest import FIXTURES, run

TWO = FIXTURES / "nbest_two_utterances.jsonl"


def test_reads_contract_example_and_skips_blank_lines() -> None:
    utts = list(read_nbest(TWO))
    assert [u["id"] for u in utts] == ["lark-0001", "lark-0002"]
    assert utts[1]["hypotheses"][2]["text"] == ""  # the recognizer heard no words
    assert utts[0]["meta"] == {"speaker": "s01"}
    assert [line for line, _ in iter_nbest(TWO)] == [1, 3]


def test_gzip_reads_the_same(tmp_path: Path) -> None:
    packed = tmp_path / "two.jsonl.gz"
    packed.write_bytes(gzip.compress(TWO.read_bytes()))
    assert list(read_nbest(packed)) == list(read_nbest(TWO))


def test_header_log10_costs_converted_to_natural_log_likelihood() -> None:
    # cost 30 in log10 units is a natural-log likelihood of -30 * ln(10)
    (utt,) = read_nbest(FIXTURES / "nbest_log10_costs.jsonl")
    assert utt["hypotheses"][0]["acoustic"] == pytest.approx(-30.0 * math.log(10))


def test_command_line_convention_wins_over_header() -> None:
    (utt,) = read_nbest(FIXTURES / "nbest_log10_costs.jsonl", log_base=math.e, costs=False)
    assert utt["hypotheses"][0]["acoustic"] == pytest.approx(30.0)


def test_refs_file_supplies_references() -> None:
    refs = read_refs(FIXTURES / "refs_two_utterances.tsv")
    utts = list(read_nbest(TWO, refs=refs | {"lark-0001": "vent bay three"}))
    assert utts[0]["reference"] == "vent bay three"


def test_one_best_follows_best_index() -> None:
    utt = next(read_nbest(TWO))
    assert one_best(utt)["text"].startswith("went")
    utt["best"] = 1
    assert one_best(utt)["text"].startswith("vent")


def test_writer_round_trips(tmp_path: Path) -> None:
    out = tmp_path / "copy.jsonl.gz"
    assert write_nbest(out, read_nbest(TWO)) == 2
    assert list(read_nbest(out)) == list(read_nbest(TWO))


GOOD = {"id": "u1", "reference": "row two",
        "hypotheses": [{"text": "row two", "acoustic": -1.0}]}


def _line(**changes: object) -> str:
    rec = json.loads(json.dumps(GOOD))
    rec.update(changes)
    return json.dumps(rec)


BAD_CASES = [
    # (label, file lines, line, field fragment)
    ("syntax", [_line(), '{"id": "u2", "hypotheses": ['], 2, "json"),
    ("empty list", [_line(hypotheses=[])], 1, "hypotheses"),
    ("nan", [_line(hypotheses=[{"text": "a", "acoustic": float("nan")}])], 1,
     "hypotheses[0].acoustic"),
    ("infinite", ['{"id": "u1", "hypotheses": [{"text": "a", "acoustic": -Infinity}]}'], 1,
     "hypotheses[0].acoustic"),
    ("string score", [_line(hypotheses=[{"text": "a", "acoustic": "-1"}])], 1,
     "hypotheses[0].acoustic"),
    ("missing acoustic", [_line(hypotheses=[{"text": "a"}, {"text": "b"}])], 1,
     "hypotheses[0].acoustic"),
    ("unknown key", [_line(speaker="s1")], 1, "speaker"),
    ("typo in hypothesis", [_line(hypotheses=[{"text": "a", "acoustc": -1.0}])], 1,
     "hypotheses[0].acoustc"),
    ("duplicate id", [_line(), _line()], 2, "id"),
    ("missing reference", [_line(), json.dumps({"id": "u2", "hypotheses": GOOD["hypotheses"]})],
     2, "reference"),
    ("best out of range", [_line(best=3)], 1, "best"),
    ("header not first", [_line(), '{"nbest_header": {"log_base": 10}}'], 2, "nbest_header"),
    ("bad header", ['{"nbest_header": {"log_base": -2}}', _line()], 1, "nbest_header.log_base"),
]


@pytest.mark.parametrize(("label", "lines", "line", "field"), BAD_CASES,
                         ids=[c[0] for c in BAD_CASES])
def test_malformed_nbest_one_line_error(tmp_path: Path, label: str, lines: list[str],
                                        line: int, field: str) -> None:
    path = tmp_path / "bad.jsonl"
    path.write_text("\n".join(lines) + "\n")
    with pytest.raises(InputError) as info:
        list(read_nbest(path))
    assert info.value.line == line and field in (info.value.field or "")
    result = run(["check", path])
    assert result.exit_code == 1
    assert result.stdout == ""
    err = result.stderr.strip().splitlines()
    assert len(err) == 1 and err[0].startswith(f"error: {path}:{line}: ")
    assert "Traceback" not in result.stderr


def test_refs_missing_for_some_ids(tmp_path: Path) -> None:
    refs = tmp_path / "refs.tsv"
    refs.write_text("lark-0001\tvent bay three\n")
    result = run(["check", TWO, "--refs", refs])
    assert result.exit_code == 1
    assert f"{TWO}:3: id: no reference for id 'lark-0002'" in result.stderr


def test_refs_for_unknown_ids(tmp_path: Path) -> None:
    refs = tmp_path / "refs.tsv"
    refs.write_text(FIXTURES.joinpath("refs_two_utterances.tsv").read_text() + "bay3-0009\tx\n")
    result = run(["check", TWO, "--refs", refs])
    assert result.exit_code == 1
    assert "3 references for 2 utterances; ids not in the N-best file: bay3-0009" in result.stderr


@pytest.mark.parametrize(("content", "message"), [
    ("lark-0001 no tab here\n", "no tab"),
    ("\tvent\n", "empty id"),
    ("a\tx\na\ty\n", "duplicate id 'a' (first on line 1)"),
])
def test_malformed_refs(tmp_path: Path, content: str, message: str) -> None:
    refs = tmp_path / "refs.tsv"
    refs.write_text(content)
    with pytest.raises(InputError, match=re.escape(message)):
        read_refs(refs)


def test_invalid_utf8_reports_byte_offset(tmp_path: Path) -> None:
    path = tmp_path / "latin1.jsonl"
    first = (_line() + "\n").encode()
    path.write_bytes(first + b'{"id": "caf\xe9"}\n')
    with pytest.raises(InputError) as info:
        list(read_nbest(path))
    assert info.value.line == 2
    assert f"byte offset {len(first) + 11}" in str(info.value)


def test_missing_file_is_a_clean_error(tmp_path: Path) -> None:
    result = run(["check", tmp_path / "nope.jsonl"])
    assert result.exit_code == 1
    assert result.stderr.strip() == f"error: {tmp_path / 'nope.jsonl'}: file not found"


def test_real_recognizer_files_read_cleanly(sample_dir: Path) -> None:
    # Facts stated in the sample's README: 30 utterances a file, 20-best lists.
    for name in ("warehouse_flite.jsonl", "warehouse_espeak.jsonl"):
        utts = list(read_nbest(sample_dir / name, require_references=True))
        assert len(utts) == 30
        assert max(len(u["hypotheses"]) for u in utts) == 20


def test_rescored_files_of_either_release_read_and_rescore_to_word_count(tmp_path: Path) -> None:
    # a rescored hypothesis carries word_count; files written before it was named so carry
    # words: both read, and rescoring such a file again writes word_count alone
    old = tmp_path / "old.jsonl"
    old.write_text(_line(hypotheses=[{"text": "row two", "acoustic": -1.0, "lm": -2.0,
                                      "words": 2, "total": -3.0}], best=0) + "\n")
    new = tmp_path / "new.jsonl"
    new.write_text(_line(hypotheses=[{"text": "row two", "acoustic": -1.0, "lm": -2.0,
                                      "word_count": 2, "total": -3.0}], best=0) + "\n")
    assert [u["hypotheses"][0].get("words") for u in read_nbest(old)] == [2]
    assert [u["hypotheses"][0].get("word_count") for u in read_nbest(new)] == [2]
    weights = tmp_path / "w.json"
    weights.write_text('{"acoustic_scale": 1, "lm_weight": 0, "insertion_penalty": 0.5}')
    out = tmp_path / "again.jsonl"
    assert run(["apply", old, "--weights", weights, "-o", out]).exit_code == 0
    (hyp,) = json.loads(out.read_text())["hypotheses"]
    assert hyp["word_count"] == 2 and "words" not in hyp
