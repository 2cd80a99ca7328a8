"""Error counts, alignments and CER checked against jiwer, a plain DP and a textbook example."""

from __future__ import annotations

import jiwer
import pytest
from hypothesis import given
from hypothesis import strategies as st

from rescore.wer import (
    align,
    align_counts,
    align_many,
    corpus_cer,
    corpus_wer,
    counts_from_alignments,
    utterance_counts,
)


def w(text: str) -> list[str]:
    """Words of a space-separated string."""
    return text.split()

TOL = 1e-12
VOCAB = ["bay", "row", "pump", "vent", "lamp", "four", "for", "ph", "ec", "on"]
words = st.lists(st.sampled_from(VOCAB), max_size=12)


def plain_edit_distance(ref: list[str], hyp: list[str]) -> int:
    """Textbook Levenshtein recurrence over words, unit costs (the slow obvious version)."""
    prev = list(range(len(hyp) + 1))
    for i, r in enumerate(ref, 1):
        cur = [i]
        for j, h in enumerate(hyp, 1):
            cur.append(min(prev[j] + 1, cur[j - 1] + 1, prev[j - 1] + (r != h)))
        prev = cur
    return prev[-1]


@given(words, words)
def test_alignment_agrees_with_jiwer_and_plain_dp(ref: list[str], hyp: list[str]) -> None:
    # source: jiwer.process_words (reference library) and the Levenshtein recurrence
    al = align(ref, hyp)
    assert al.reference == ref and al.hypothesis == hyp
    assert al.errors == plain_edit_distance(ref, hyp)
    assert al.counts() == align_counts(ref, hyp)
    if ref:
        out = jiwer.process_words(" ".join(ref), " ".join(hyp) if hyp else "")
        assert (al.substitutions, al.deletions, al.insertions, al.hits) == (
            out.substitutions, out.deletions, out.insertions, out.hits)


@given(st.lists(st.tuples(st.lists(st.sampled_from(VOCAB), min_size=1, max_size=10), words),
                min_size=1, max_size=8))
def test_corpus_wer_and_cer_agree_with_jiwer(pairs: list[tuple[list[str], list[str]]]) -> None:
    # source: jiwer.wer / jiwer.cer over the whole list are total errors / total reference units
    refs = [r for r, _ in pairs]
    hyps = [h for _, h in pairs]
    ref_s = [" ".join(r) for r in refs]
    hyp_s = [" ".join(h) for h in hyps]
    assert corpus_wer(refs, hyps).wer == pytest.approx(jiwer.wer(ref_s, hyp_s), abs=TOL)
    assert corpus_cer(refs, hyps).cer == pytest.approx(jiwer.cer(ref_s, hyp_s), abs=TOL)
    batch = counts_from_alignments(align_many(refs, hyps))
    single = utterance_counts(refs, hyps)
    assert (batch.errors == single.errors).all()
    assert (batch.reference_words == single.reference_words).all()


def test_textbook_example_counts() -> None:
    # source: Jurafsky and Martin, Speech and Language Processing, 3rd ed. draft, speech
    # recognition chapter: 13 reference words aligned with 6 substitutions, 1 deletion and
    # 3 insertions, WER 10/13. The words below are our own; the alignment is reconstructed
    # to have exactly those counts.
    ref = w("lamp row four dimmed at nine after the crew checked bay two pumps")
    hyp = w("uh lamb row for dimmed nine half a crew check it bay too pumps okay")
    assert len(ref) == 13
    al = align(ref, hyp)
    assert (al.substitutions, al.deletions, al.insertions) == (6, 1, 3)
    assert plain_edit_distance(ref, hyp) == 10
    assert corpus_wer([ref], [hyp]).wer == pytest.approx(10 / 13, abs=TOL)


def test_alignment_ops_mark_each_word() -> None:
    # derived by hand: cost 3 (substitute "bay" by "day", delete "pump", insert "on"); any
    # alignment that does not keep "three", "row" and "vent" as hits costs at least 4
    al = align(w("bay three pump row vent"), w("day three row vent on"))
    assert [(op.kind, op.ref, op.hyp) for op in al.ops] == [
        ("substitute", "bay", "day"), ("equal", "three", "three"), ("delete", "pump", None),
        ("equal", "row", "row"), ("equal", "vent", "vent"), ("insert", None, "on")]


@pytest.mark.parametrize(("ref", "hyp", "counts"), [
    ([], [], (0, 0, 0, 0)),           # nothing said, nothing heard
    ([], ["bay"], (0, 0, 1, 0)),      # every hypothesis word is an insertion
    (["bay", "two"], [], (0, 2, 0, 0)),  # every reference word is deleted
])
def test_empty_sides(ref: list[str], hyp: list[str], counts: tuple[int, ...]) -> None:
    # definition of the edit operations (an empty side admits one alignment only)
    assert align(ref, hyp).counts() == counts


def test_cer_counts_spaces_between_words() -> None:
    # source: jiwer.cer counts every character of the joined text, spaces included
    result = corpus_cer([["ab", "c"]], [["abd", "c"]])
    assert (result.insertions, result.reference_chars) == (1, 4)
    assert result.cer == pytest.approx(jiwer.cer("ab c", "abd c"), abs=TOL)
