"""Error counts, alignments and CER checked against jiwer, a plain DP and a textbook example."""

from __future__ import annotations

from pathlib import Path

import jiwer
import pytest
from hypothesis import given
from hypothesis import strategies as st
from rapidfuzz.distance import Levenshtein

from rescore.nbest import read_nbest
from rescore.text import tokens
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
        # the counting path calls rapidfuzz as jiwer does, without jiwer's text transforms
        assert align_counts(ref, hyp) == (out.substitutions, out.deletions, out.insertions,
                                          out.hits)


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


# --- tie-break among minimum-edit alignments: substitute the words that look alike -------

def ops_of(ref: str, hyp: str) -> list[tuple[str, str | None, str | None]]:
    return [(op.kind, op.ref, op.hyp) for op in align(w(ref), w(hyp)).ops]


def test_tie_break_substitutes_the_similar_word_before_an_insertion() -> None:
    # jiwer 4.0 aligns this as  two  *      croissant  please
    #                           two  cross  aunt       please   (insert, then substitute)
    # Both cost 2 (one substitution, one insertion); the one a person writes is
    #                           two  croissant  *     please
    #                           two  cross      aunt  please
    # Indel similarity, 1 - (len a + len b - 2 * longest common subsequence) / (len a + len b):
    # croissant/cross: "cross" is a subsequence of "croissant", 1 - (9 + 5 - 10) / 14 = 0.714;
    # croissant/aunt: common subsequence "ant", 1 - (9 + 4 - 6) / 13 = 0.462. So "cross".
    jiwer_ops = jiwer.process_words("two croissant please", "two cross aunt please")
    assert [c.type for c in jiwer_ops.alignments[0]] == ["equal", "insert", "substitute",
                                                           "equal"]
    assert ops_of("two croissant please", "two cross aunt please") == [
        ("equal", "two", "two"), ("substitute", "croissant", "cross"),
        ("insert", None, "aunt"), ("equal", "please", "please")]


def test_tie_break_substitutes_the_similar_word_beside_a_deletion() -> None:
    # by hand: ref "vent bay three", hyp "bays": no hit is possible, so one substitution and
    # two deletions in any minimum alignment (cost 3). Candidates for the substitution:
    # vent/bays and three/bays share no letter (similarity 0), bay/bays 1 - (3 + 4 - 6) / 7
    # = 0.857. So:
    #   vent  bay   three
    #   *     bays  *
    assert ops_of("vent bay three", "bays") == [
        ("delete", "vent", None), ("substitute", "bay", "bays"), ("delete", "three", None)]


def test_tie_break_keeps_jiwer_when_no_pairing_is_more_alike() -> None:
    # by hand: "row", "ec" and "to" share no letter with "bay" or "lamp": every pairing scores 0,
    # so jiwer's own alignment is kept unchanged, step for step
    ref, hyp = w("bay lamp"), w("row ec to")
    chunks = jiwer.process_words(" ".join(ref), " ".join(hyp)).alignments[0]
    expected = [c.type for c in chunks for _ in range(max(c.ref_end_idx - c.ref_start_idx,
                                                           c.hyp_end_idx - c.hyp_start_idx))]
    assert [op.kind for op in align(ref, hyp).ops] == expected


SIMILAR_VOCAB = ["bay", "bays", "row", "rows", "pump", "pumps", "vent", "went", "for",
                 "four", "fort", "on", "one"]
similar_words = st.lists(st.sampled_from(SIMILAR_VOCAB), max_size=12)


@given(similar_words, similar_words)
def test_tie_break_never_changes_a_count(ref: list[str], hyp: list[str]) -> None:
    # source: jiwer.process_words (reference library): the re-paired alignment has exactly
    # jiwer's substitutions, deletions, insertions and hits, and still spells out both sides
    al = align(ref, hyp)
    assert al.reference == ref and al.hypothesis == hyp
    assert al.errors == plain_edit_distance(ref, hyp)
    if ref:
        out = jiwer.process_words(" ".join(ref), " ".join(hyp) if hyp else "")
        assert al.counts() == (out.substitutions, out.deletions, out.insertions, out.hits)
    assert all((op.ref == op.hyp) == (op.kind == "equal") for op in al.ops)


# --- the character unit: CER with spaces dropped ----------------------------------------

# CJK ideographs and kana, Thai (with its combining vowel and tone marks), Latin and digits,
# and spaces, so that mixed-script strings and word breaks occur
SCRIPTS = "東京都の天気は晴れです日本語ภาษาไทยสวัสดีครับ่้ัabcé12 "
scripted = st.text(alphabet=st.sampled_from(SCRIPTS), max_size=24)


@given(st.lists(st.tuples(scripted, scripted), min_size=1, max_size=6))
def test_cer_without_spaces_equals_jiwer(pairs: list[tuple[str, str]]) -> None:
    # source: jiwer.cer (reference library) over the normalised strings with spaces removed
    from_text = [(tokens(r), tokens(h)) for r, h in pairs]
    kept = [(r, h) for r, h in from_text if r]  # jiwer refuses an empty reference
    if not kept:
        return
    refs = [r for r, _ in kept]
    hyps = [h for _, h in kept]
    got = corpus_cer(refs, hyps, spaces=False)
    expected = jiwer.cer(["".join(r) for r in refs], ["".join(h) for h in hyps])
    assert got.cer == pytest.approx(expected, abs=TOL)
    assert got.reference_chars == sum(len("".join(r)) for r in refs)


def test_cer_without_spaces_ignores_where_words_break() -> None:
    # by hand: the same characters cut into words differently are no error at all in the
    # character unit ("東京 都" vs "東 京都"); with spaces counted, the moved space is 2 edits
    # (jiwer.cer("東京 都", "東 京都") = 2/4)
    assert corpus_cer([["東京", "都"]], [["東", "京都"]], spaces=False).cer == 0.0
    assert corpus_cer([["東京", "都"]], [["東", "京都"]]).cer == pytest.approx(
        jiwer.cer("東京 都", "東 京都"), abs=TOL)


@pytest.mark.parametrize("name", ["warehouse_espeak.jsonl", "warehouse_flite.jsonl"])
def test_tie_break_keeps_jiwer_counts_on_recognizer_lists(sample_dir: Path, name: str) -> None:
    # source: jiwer.process_words (reference library) on every hypothesis of real lists
    refs: list[list[str]] = []
    hyps: list[list[str]] = []
    for utt in read_nbest(sample_dir / name):
        for h in utt["hypotheses"]:
            if utt.get("reference") and h["text"]:
                refs.append(tokens(utt["reference"]))
                hyps.append(tokens(h["text"]))
    pairs = [(r, h) for r, h in zip(refs, hyps, strict=True) if r and h]
    out = jiwer.process_words([" ".join(r) for r, _ in pairs], [" ".join(h) for _, h in pairs])
    als = align_many([r for r, _ in pairs], [h for _, h in pairs])
    got = counts_from_alignments(als)
    for k, (s, d, i, hits) in enumerate(zip(got.substitutions, got.deletions, got.insertions,
                                            got.hits, strict=True)):
        ref, hyp = pairs[k]
        assert als[k].reference == ref and als[k].hypothesis == hyp
        assert (s + d + i) == Levenshtein.distance(ref, hyp)
        assert s + d + hits == len(ref)
    assert (int(got.substitutions.sum()), int(got.deletions.sum()),
            int(got.insertions.sum()), int(got.hits.sum())) == (
        out.substitutions, out.deletions, out.insertions, out.hits)
