"""Alignment under scoring rules: hand-worked cases per rule, and properties against jiwer
and rapidfuzz's edit distance (reference libraries)."""

from __future__ import annotations

from itertools import combinations

import jiwer
from hypothesis import given, settings
from hypothesis import strategies as st
from rapidfuzz.distance import Levenshtein

from rescore.align import CompiledRules, align_with_rules
from rescore.rules import ScoringRules, parse_rules
from rescore.wer import Alignment, align_many

VOCAB = ["bay", "row", "pump", "vent", "four", "for", "on", "um", "uh", "ok", "okay"]
words = st.lists(st.sampled_from(VOCAB), max_size=9)


def w(text: str) -> list[str]:
    return text.split()


def drawn(al: Alignment) -> list[tuple[str, str | None, str | None]]:
    return [(op.kind, op.ref, op.hyp) for op in al.ops]


def one(ref: str, hyp: str, rules: ScoringRules) -> Alignment:
    return align_with_rules([w(ref)], [w(hyp)], rules)[0]


def check_spelt_out(al: Alignment, ref: list[str], hyp: list[str]) -> None:
    """Both sides are read back in order, and the counts add up to them."""
    assert al.reference == ref and al.hypothesis == hyp
    s, d, i, h = al.counts()
    assert s + d + h == len(ref)
    assert al.errors == s + d + i


# --- hand-worked cases, one per kind of rule --------------------------------------------

def test_equivalent_single_words_are_hits() -> None:
    # by hand, with ["ok", "okay"] equivalent:
    #   ok    vent  bay
    #   okay  vent  bay      -> 3 hits, 0 errors (without the rule: 1 substitution)
    rules = ScoringRules(equivalent=(("ok", "okay"),))
    al = one("ok vent bay", "okay vent bay", rules)
    assert drawn(al) == [("equivalent", "ok", "okay"), ("equal", "vent", "vent"),
                         ("equal", "bay", "bay")]
    assert al.counts() == (0, 0, 0, 3)
    assert align_many([w("ok vent bay")], [w("okay vent bay")])[0].counts() == (1, 0, 0, 2)


def test_equivalent_phrase_matches_a_single_word() -> None:
    # by hand, with ["all right", "alright"] equivalent:
    #   all right  vent
    #   alright    vent      -> 2 reference words hit by the phrase, 1 by "vent": 3 hits
    # without the rule the best is "all" -> "alright" and "right" deleted: 2 errors
    rules = ScoringRules(equivalent=(("all right", "alright"),))
    al = one("all right vent", "alright vent", rules)
    assert drawn(al) == [("equivalent", "all right", "alright"), ("equal", "vent", "vent")]
    assert al.counts() == (0, 0, 0, 3)
    check_spelt_out(al, w("all right vent"), w("alright vent"))
    assert align_many([w("all right vent")], [w("alright vent")])[0].errors == 2


def test_equivalent_phrase_in_the_hypothesis() -> None:
    # by hand, the other way round (spellings are symmetric within a group):
    #   alright    vent
    #   all right  vent      -> 1 hit for the phrase (one reference word), 1 for "vent"
    rules = ScoringRules(equivalent=(("all right", "alright"),))
    al = one("alright vent", "all right vent", rules)
    assert drawn(al) == [("equivalent", "alright", "all right"), ("equal", "vent", "vent")]
    assert al.counts() == (0, 0, 0, 2)


def test_optional_word_left_out_is_no_deletion() -> None:
    # by hand, "um" optional:
    #   um  vent  bay
    #   *   vent  bay        -> no error; "um" counts as a correct reference word
    rules = ScoringRules(optional=("um",))
    al = one("um vent bay", "vent bay", rules)
    assert drawn(al) == [("optional", "um", None), ("equal", "vent", "vent"),
                         ("equal", "bay", "bay")]
    assert al.counts() == (0, 0, 0, 3)


def test_optional_word_present_is_matched_as_usual() -> None:
    # by hand, "um" optional: said -> a hit; misheard as "uh" -> a substitution (skipping
    # "um" and inserting "uh" costs the same 1 error, but matches no word and pairs none)
    rules = ScoringRules(optional=("um",))
    assert drawn(one("um vent", "um vent", rules)) == [("equal", "um", "um"),
                                                       ("equal", "vent", "vent")]
    al = one("um vent", "uh vent", rules)
    assert drawn(al) == [("substitute", "um", "uh"), ("equal", "vent", "vent")]
    assert al.counts() == (1, 0, 0, 1)


def test_optional_word_only_in_the_hypothesis_is_an_insertion() -> None:
    # by hand: optional concerns reference words; "um" heard but not said:
    #   *   vent
    #   um  vent             -> 1 insertion
    rules = ScoringRules(optional=("um",))
    assert one("vent", "um vent", rules).counts() == (0, 0, 1, 1)


def test_ignored_tokens_leave_both_sides() -> None:
    # by hand, "mm" ignored:  ref  mm vent bay   -> vent bay
    #                         hyp  vent mm bay mm -> vent bay      : 2 hits, nothing else
    rules = ScoringRules(ignore=("mm",))
    al = one("mm vent bay", "vent mm bay mm", rules)
    assert drawn(al) == [("equal", "vent", "vent"), ("equal", "bay", "bay")]
    assert al.counts() == (0, 0, 0, 2)


def test_ignore_works_on_raw_tokens_before_punctuation() -> None:
    # "[noise]" would normalise to the word "noise"; it is dropped before that
    rules = ScoringRules(ignore=("[noise]",))
    assert rules.words("[noise] Vent bay, noise") == ["vent", "bay", "noise"]


def test_rules_keep_the_look_alike_tie_break() -> None:
    # as in rescore.wer: croissant/cross (0.714) beats croissant/aunt (0.462), cost 2 either way
    rules = ScoringRules(optional=("um",))
    assert drawn(one("two croissant please", "two cross aunt please", rules)) == [
        ("equal", "two", "two"), ("substitute", "croissant", "cross"),
        ("insert", None, "aunt"), ("equal", "please", "please")]


# --- properties ---------------------------------------------------------------------------

@given(st.lists(st.tuples(words, words), min_size=1, max_size=6))
def test_empty_rules_file_gives_jiwer(pairs: list[tuple[list[str], list[str]]]) -> None:
    # source: jiwer.process_words (reference library); an empty file is no rule at all, and
    # the alignments are align_many's, op for op
    rules = parse_rules(b"", "empty.toml").rules
    refs = [r for r, _ in pairs]
    hyps = [h for _, h in pairs]
    got = align_with_rules(refs, hyps, rules)
    assert got == align_many(refs, hyps)
    for al, ref, hyp in zip(got, refs, hyps, strict=True):
        if ref:
            out = jiwer.process_words(" ".join(ref), " ".join(hyp) if hyp else "")
            assert al.counts() == (out.substitutions, out.deletions, out.insertions, out.hits)


@given(words, words)
def test_rules_on_absent_words_give_the_edit_distance(ref: list[str], hyp: list[str]) -> None:
    # source: rapidfuzz Levenshtein.distance over words (reference library): the dynamic
    # programme, given rules about words that never occur, finds the minimum error count;
    # align_with_rules leaves such utterances to align_many altogether
    rules = ScoringRules(equivalent=(("zulu", "yankee x"),), optional=("xray",),
                         ignore=("<sil>",))
    al = CompiledRules.of(rules).align(ref, hyp)
    check_spelt_out(al, ref, hyp)
    assert al.errors == Levenshtein.distance(ref, hyp)
    assert align_with_rules([ref], [hyp], rules) == align_many([ref], [hyp])


@settings(max_examples=60)
@given(words, words)
def test_optional_words_are_free_deletions(ref: list[str], hyp: list[str]) -> None:
    # definition: leaving out optional words costs nothing, so the fewest errors is the
    # smallest edit distance (rapidfuzz) over every choice of optional words left out
    rules = ScoringRules(optional=("um", "uh"))
    al = align_with_rules([ref], [hyp], rules)[0]
    check_spelt_out(al, ref, hyp)
    spots = [k for k, word in enumerate(ref) if word in ("um", "uh")]
    best = min(Levenshtein.distance([x for k, x in enumerate(ref) if k not in gone], hyp)
               for n in range(len(spots) + 1) for gone in map(set, combinations(spots, n)))
    assert al.errors == best


@given(words, words)
def test_single_word_equivalents_are_a_rewrite(ref: list[str], hyp: list[str]) -> None:
    # definition: with one-word spellings only, equivalence is spelling every word of a
    # group the same way on both sides; the edit distance (rapidfuzz) of the rewrite
    rules = ScoringRules(equivalent=(("ok", "okay"), ("four", "for")))
    canon = {"okay": "ok", "for": "four"}
    al = align_with_rules([ref], [hyp], rules)[0]
    check_spelt_out(al, ref, hyp)
    assert al.errors == Levenshtein.distance([canon.get(x, x) for x in ref],
                                             [canon.get(x, x) for x in hyp])


@given(words, words)
def test_ignored_words_are_removed_first(ref: list[str], hyp: list[str]) -> None:
    # definition: ignoring is removal from both sides; jiwer's edit distance of what is left
    rules = ScoringRules(ignore=("um", "uh"))
    al = align_with_rules([ref], [hyp], rules)[0]
    kept_r = [x for x in ref if x not in ("um", "uh")]
    kept_h = [x for x in hyp if x not in ("um", "uh")]
    check_spelt_out(al, kept_r, kept_h)
    assert al.errors == Levenshtein.distance(kept_r, kept_h)
