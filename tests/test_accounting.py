"""Every utterance read is accounted for: apply and wer compare what reached the output with
what was read, and a mismatch (a defect) leaves no output behind.

The faults are injected on purpose: the reliability audit found that apply's old check
compared the batch read with the same batch scored, so it could never fire. These tests
drop a record on its way to the file and require the check to notice.
"""

from __future__ import annotations

from collections.abc import Callable, Iterator, Sequence
from pathlib import Path
from typing import Any

import pytest

from rescore import counting, parallel, pipeline
from rescore.errors import AccountingError, RescoreError
from rescore.nbest import Utterance
from rescore.outputs import TextSink
from rescore.weights import Weights
from tests.conftest import FIXTURES

TWO = FIXTURES / "nbest_two_utterances.jsonl"
WEIGHTS = Weights(1.0, 0.0, 0.0, {})


def _drop_last(real: Callable[..., int]) -> Callable[..., int]:
    """A writer that loses the last record of every batch (the fault under test)."""

    def write(scored: Sequence[Utterance], fh: TextSink, tsv: TextSink | None,
              **where: Any) -> int:
        return real(list(scored)[:-1], fh, tsv, **where)

    return write


def _names(folder: Path) -> list[str]:
    return sorted(p.name for p in folder.iterdir())


def test_apply_notices_a_record_lost_by_the_writer(tmp_path: Path,
                                                   monkeypatch: pytest.MonkeyPatch) -> None:
    monkeypatch.setattr(pipeline, "write_scored", _drop_last(pipeline.write_scored))
    out, tsv = tmp_path / "out.jsonl", tmp_path / "out.tsv"
    with pytest.raises(AccountingError, match="2 utterances read but 1 lines written to") as info:
        pipeline.apply_file(TWO, out, models={}, weights=WEIGHTS, text_path=tsv)
    assert isinstance(info.value, RescoreError) and info.value.exit_code == 1
    assert info.value.path == str(TWO)
    assert _names(tmp_path) == []  # neither output, and no temporary


def test_apply_counts_the_lines_that_reach_the_text_file(tmp_path: Path,
                                                         monkeypatch: pytest.MonkeyPatch) -> None:
    # the JSON output is whole; only the TSV loses a line: still refused, nothing kept
    real = pipeline.write_scored

    def lossy_tsv(scored: Sequence[Utterance], fh: TextSink, tsv: TextSink | None,
                  **where: Any) -> int:
        changed = real(scored, fh, None)
        if tsv is not None:
            real(list(scored)[1:], _Discard(), tsv)
        return changed

    monkeypatch.setattr(pipeline, "write_scored", lossy_tsv)
    with pytest.raises(AccountingError, match=r"lines written to .*out\.tsv"):
        pipeline.apply_file(TWO, tmp_path / "out.jsonl", models={}, weights=WEIGHTS,
                            text_path=tmp_path / "out.tsv")
    assert _names(tmp_path) == []


class _Discard:
    def write(self, text: str, /) -> int:
        return len(text)


class _InProcessRunner:
    """Runs the shards here, one after another, so that a patched writer reaches them."""

    def __init__(self, workers: int, cluster: str | None) -> None:
        pass

    def map(self, fn: Callable[[Any], Any], tasks: Sequence[Any]) -> Iterator[Any]:
        return (fn(task) for task in tasks)

    def close(self) -> None:
        pass

    def abort(self) -> None:
        pass


def test_parallel_apply_notices_a_record_lost_in_a_shard(tmp_path: Path,
                                                         monkeypatch: pytest.MonkeyPatch) -> None:
    monkeypatch.setattr(parallel, "_Runner", _InProcessRunner)
    # the worker's own name of the batch writer (rescore.batch, imported by parallel)
    monkeypatch.setattr(parallel, "write_scored", _drop_last(parallel.write_scored))
    out = tmp_path / "out.jsonl"
    with pytest.raises(AccountingError, match="2 utterances read but 1 lines in the joined"):
        pipeline.apply_file(TWO, out, models={}, weights=WEIGHTS, workers=2,
                            text_path=tmp_path / "out.tsv")
    assert _names(tmp_path) == []


def test_parallel_apply_without_fault_passes_the_check(tmp_path: Path,
                                                       monkeypatch: pytest.MonkeyPatch) -> None:
    # the same in-process path with an honest writer: the check must not fire
    monkeypatch.setattr(parallel, "_Runner", _InProcessRunner)
    result = pipeline.apply_file(TWO, tmp_path / "out.jsonl", models={}, weights=WEIGHTS,
                                 workers=2, text_path=tmp_path / "out.tsv")
    assert result.utterances == 2
    assert (tmp_path / "out.tsv").read_text().count("\n") == 2


def test_wer_notices_an_utterance_left_unscored(monkeypatch: pytest.MonkeyPatch) -> None:
    # wer_file counts errors batch by batch: drop the last utterance of each batch
    # (the counts are made by rescore.counting, which wer_file counts through)
    real = counting.utterance_counts
    monkeypatch.setattr(counting, "utterance_counts",
                        lambda refs, hyps: real(refs[:-1], hyps[:-1]))
    with pytest.raises(AccountingError, match="2 utterances read but 1 scored"):
        pipeline.wer_file(TWO)


def test_text_output_keeps_one_line_per_utterance(tmp_path: Path) -> None:
    # a hypothesis may contain a tab or line break (valid JSON); the 'id<TAB>text' file
    # must still hold one line per utterance, so they are written as spaces
    src = tmp_path / "breaks.jsonl"
    src.write_text('{"id": "u1", "hypotheses": [{"text": "vent\\nbay\\tthree\\r", '
                   '"acoustic": -1.0}]}\n')
    tsv = tmp_path / "out.tsv"
    pipeline.apply_file(src, tmp_path / "out.jsonl", models={}, weights=WEIGHTS, text_path=tsv)
    assert tsv.read_bytes() == b"u1\tvent bay three \n"


@pytest.mark.parametrize("workers", [1, 2])
def test_id_with_a_tab_is_refused_for_the_text_file(tmp_path: Path, workers: int) -> None:
    # a JSON id may hold a tab (valid JSON), but an id<TAB>text line cannot (the contract's
    # transcript format): a clear input error naming the line, not an accounting defect
    from rescore.errors import InputError

    src = tmp_path / "tab.jsonl"
    src.write_text('{"id": "u1", "hypotheses": [{"text": "vent", "acoustic": -1.0}]}\n'
                   '{"id": "u\\t2", "hypotheses": [{"text": "bay", "acoustic": -1.0}]}\n')
    out, tsv = tmp_path / "out.jsonl", tmp_path / "out.tsv"
    with pytest.raises(InputError, match="tab or line break") as info:
        pipeline.apply_file(src, out, models={}, weights=WEIGHTS, text_path=tsv,
                            workers=workers)
    assert (info.value.line, info.value.field) == (2, "id")
    assert sorted(p.name for p in tmp_path.iterdir()) == ["tab.jsonl"]
    # without --text the same file is fine
    pipeline.apply_file(src, out, models={}, weights=WEIGHTS)
    assert out.read_text().count("\n") == 2


def test_wer_of_transcripts_notices_an_utterance_left_unscored(
        monkeypatch: pytest.MonkeyPatch) -> None:
    refs = FIXTURES / "refs_two_utterances.tsv"
    real = counting.utterance_counts
    monkeypatch.setattr(counting, "utterance_counts", lambda r, h: real(r[1:], h[1:]))
    with pytest.raises(AccountingError, match="2 utterances read but 1 scored"):
        pipeline.wer_transcripts(refs, refs)
