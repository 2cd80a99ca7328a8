"""Scripts other than Latin: normalised, aligned and scored like any other text."""

from __future__ import annotations

import json
from pathlib import Path

import jiwer
import pytest

from rescore.counting import Counting
from rescore.rules import RulesFile, parse_rules
from rescore.text import tokens
from rescore.wer import corpus_cer, corpus_wer
from tests.conftest import run


def _wer_and_jiwer(tmp_path: Path, refs: list[str], hyps: list[str]) -> tuple[float, float]:
    """``rescore wer --refs --hyps`` of the texts, and jiwer's WER of the same normalised
    words (the reference)."""
    refs_file, hyps_file = tmp_path / "refs.tsv", tmp_path / "hyps.tsv"
    refs_file.write_text("".join(f"u{i}\t{t}\n" for i, t in enumerate(refs)), encoding="utf-8")
    hyps_file.write_text("".join(f"u{i}\t{t}\n" for i, t in enumerate(hyps)), encoding="utf-8")
    result = run(["wer", "--refs", refs_file, "--hyps", hyps_file, "--json"])
    assert result.exit_code == 0, result.stderr
    expected = jiwer.wer([" ".join(tokens(r)) for r in refs], [" ".join(tokens(h)) for h in hyps])
    return float(json.loads(result.stdout)["wer"]), float(expected)


def test_greek_and_devanagari_wer_equals_jiwer(tmp_path: Path) -> None:
    # jiwer as the reference, on the same normalised words
    refs = ["Η αντλία τρία άνοιξε", "पंप तीन बंद"]
    hyps = ["η αντλία δύο άνοιξε.", "पंप तीन"]
    got, expected = _wer_and_jiwer(tmp_path, refs, hyps)
    assert got == pytest.approx(expected)
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


# --- right-to-left text, combining marks, full-width forms ------------------------------

def test_right_to_left_words_are_scored_in_logical_order(tmp_path: Path) -> None:
    # Hebrew and Arabic are stored first letter first (logical order, Unicode Standard
    # Annex 9); alignment works on that order, whatever the display direction. jiwer is
    # the reference on the same normalised words. by hand:
    #   המשאבה  נסגרה  בשעה  שלוש          (the pump closed at three)
    #   המשאבה  נפתחה  בשעה  שלוש      -> 1 substitution of 4
    #   المضخة  مغلقة                       (the pump is closed)
    #   المضخة                          -> 1 deletion of 2
    refs = ["המשאבה נסגרה בשעה שלוש", "المضخة مغلقة"]
    hyps = ["המשאבה נפתחה בשעה שלוש.", "المضخة،"]
    got, expected = _wer_and_jiwer(tmp_path, refs, hyps)
    assert got == pytest.approx(expected) == pytest.approx(2 / 6)
    # the Arabic comma U+060C is punctuation (category Po) and goes, like "."
    assert tokens("المضخة،") == ["المضخة"]


def test_hebrew_points_are_combining_marks_kept_on_their_letter() -> None:
    # niqqud are combining marks (category Mn): NFC keeps them, so a pointed and an
    # unpointed spelling are different words (a team that wants them equal lists both
    # spellings in an equivalence group); in characters each mark is one character.
    # by hand: שָׁלוֹם is ש + U+05C1 + U+05B8 + ל + ו + U+05B9 + ם, 7 code points after NFC
    pointed, plain = "שָׁלוֹם", "שלום"
    assert tokens(pointed) != tokens(plain)
    assert len("".join(tokens(pointed))) == 7
    # source: jiwer.cer on the same strings: 3 deleted marks of 7 characters
    cer = corpus_cer([tokens(pointed)], [tokens(plain)], spaces=False)
    assert cer.cer == pytest.approx(jiwer.cer("".join(tokens(pointed)), plain)) \
        == pytest.approx(3 / 7)


def test_combining_marks_in_either_order_normalise_alike() -> None:
    # NFC puts combining marks in canonical order (Unicode Standard Annex 15): a dot below
    # (U+0323, class 220) and a circumflex (U+0302, class 230) typed in either order give
    # the same letter, so "ệ" typed two ways scores as one word
    a, b = "vie\u0323\u0302t", "vie\u0302\u0323t"
    assert tokens(a) == tokens(b) == ["vi\u1ec7t"]


def test_full_width_forms_stay_apart_unless_the_rules_fold_them() -> None:
    # NFC leaves compatibility forms as they are: full-width "ＯＫ" (U+FF2F U+FF2B) is not
    # "ok" under the default steps; the rules step "nfkc" folds it (Unicode Standard
    # Annex 15, compatibility decomposition), as it folds half-width katakana
    assert tokens("ＯＫ ポンプ") == ["ｏｋ", "ポンプ"]
    folding = parse_rules(b"normalise = ['nfkc', 'lowercase', 'apostrophe', 'punctuation']\n",
                          "wide.toml").rules
    assert folding.words("ＯＫ ﾎﾟﾝﾌﾟ") == ["ok", "ポンプ"]
    # scored: by hand, the full-width hypothesis is 1 substitution of 2 words plainly, none
    # after folding
    plain = corpus_wer([tokens("ok pump")], [tokens("ＯＫ pump")])
    assert plain.substitutions == 1
    assert Counting(rules=RulesFile(folding, "wide", "0" * 64, "wide.toml")).errors(
        ["ok", "pump"], folding.words("ＯＫ pump")) == 0
