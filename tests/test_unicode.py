"""Scripts other than Latin: normalised, aligned and scored like any other text."""

from __future__ import annotations

import json
from pathlib import Path

import jiwer
import pytest

from rescore.text import tokens
from rescore.wer import corpus_cer, corpus_wer
from tests.conftest import run


def test_greek_and_devanagari_wer_equals_jiwer(tmp_path: Path) -> None:
    # jiwer as the reference, on the same normalised words
    refs = ["Η αντλία τρία άνοιξε", "पंप तीन बंद"]
    hyps = ["η αντλία δύο άνοιξε.", "पंप तीन"]
    refs_file, hyps_file = tmp_path / "refs.tsv", tmp_path / "hyps.tsv"
    refs_file.write_text("".join(f"u{i}\t{t}\n" for i, t in enumerate(refs)), encoding="utf-8")
    hyps_file.write_text("".join(f"u{i}\t{t}\n" for i, t in enumerate(hyps)), encoding="utf-8")
    result = run(["wer", "--refs", refs_file, "--hyps", hyps_file, "--json"])
    assert result.exit_code == 0, result.stderr
    expected = jiwer.wer([" ".join(tokens(r)) for r in refs], [" ".join(tokens(h)) for h in hyps])
    assert json.loads(result.stdout)["wer"] == pytest.approx(expected)
    assert expected == pytest.approx(2 / 7)  # one substitution, one deletion, 7 words


def test_cer_for_text_written_without_spaces() -> None:
    # Chinese is written without spaces: each line is one "word", so WER is all or nothing,
    # while CER counts characters (jiwer.cer is the reference)
    ref, hyp = "三号泵已关闭", "三号泵已开闭"
    assert corpus_wer([tokens(ref)], [tokens(hyp)]).wer == 1.0
    cer = corpus_cer([tokens(ref)], [tokens(hyp)])
    assert cer.cer == pytest.approx(jiwer.cer(ref, hyp)) and cer.substitutions == 1
    assert cer.cer == pytest.approx(1 / 6)


def test_decomposed_and_composed_accents_score_as_equal() -> None:
    # NFC (Unicode Standard Annex 15): "é" typed as e + U+0301 equals the precomposed letter
    ref, hyp = "caf\u00e9 ouvert", "cafe\u0301 ouvert"
    assert corpus_wer([tokens(ref)], [tokens(hyp)]).wer == 0.0
