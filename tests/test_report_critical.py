"""Critical words: numbers, negations and the user's terms counted apart on the alignments."""

from __future__ import annotations

import json
from pathlib import Path

import pytest

from rescore.errors import InputError
from rescore.report import Pair, build_report, render_all
from rescore.report.critical import (
    CriticalClass,
    classes_with_terms,
    count_alignment,
    is_negation_word,
    is_number_word,
    read_terms,
)
from rescore.wer import align

REFS = ["nut free tray fourteen", "do not open bay two", "never mind"]
BEFORE = ["nut free tray fourteen", "do open bay two", "never mind"]
AFTER = ["not free tray forty", "do not open bay to", "never mind seven"]
# The alignments, worked by hand (each is the only one of least cost):
#   u1 after:   nut  free tray fourteen        u2 before: do not open bay two
#               not  free tray forty                      do  *  open bay two
#               S    =    =    S                          =   D  =    =   =
#   u2 after:   do not open bay two            u3 after:  never mind  *
#               do not open bay to                        never mind seven
#               =  =   =    =   S                         =     =     I
# (u1 before, u3 before are exact.)
# numbers: in the references "fourteen" (u1) and "two" (u2): 2 occurrences.
#   before: none wrong -> 0 errors, rate 0.
#   after: fourteen -> forty substituted (u1), two -> to substituted (u2), "seven" inserted
#   where the reference has no number (u3): 3 errors, rate 3/2; worse in u1, u2, u3.
# negations: "not" (u2) and "never" (u3): 2 occurrences.
#   before: "not" deleted (u2): 1 error, rate 1/2.
#   after: "not" put where the reference says "nut" (u1): an inserted negation, 1 error,
#   rate 1/2; worse in u1 only (u2 got better).
# terms, the phrase "bay two": 1 occurrence (u2); after it reads "bay to": substituted.


def pairs(hyps: list[str]) -> list[Pair]:
    return [Pair.from_text(f"u{i + 1}", r, h) for i, (r, h) in enumerate(zip(REFS, hyps,
                                                                            strict=True))]


def test_hand_worked_counts_before_and_after() -> None:
    classes = classes_with_terms({"terms": [("bay", "two")]})
    report = build_report(pairs(BEFORE), pairs(AFTER), provenance={}, resamples=50,
                          critical_classes=classes)
    data = json.loads(render_all(report)["report.json"])["critical_words"]
    assert set(data) == {"numbers", "negations", "terms"}
    numbers, negations, terms = data["numbers"], data["negations"], data["terms"]
    assert numbers["before"] == {"occurrences": 2, "errors": 0, "error_rate": 0.0,
                                 "substituted": 0, "deleted": 0, "inserted": 0}
    assert numbers["after"] == {"occurrences": 2, "errors": 3, "error_rate": 1.5,
                                "substituted": 2, "deleted": 0, "inserted": 1}
    assert [w["id"] for w in numbers["worse"]] == ["u1", "u2", "u3"]
    assert negations["before"] == {"occurrences": 2, "errors": 1, "error_rate": 0.5,
                                   "substituted": 0, "deleted": 1, "inserted": 0}
    assert negations["after"] == {"occurrences": 2, "errors": 1, "error_rate": 0.5,
                                  "substituted": 0, "deleted": 0, "inserted": 1}
    assert negations["worse"] == [{"id": "u1", "before_errors": 0, "after_errors": 1}]
    assert terms["after"]["substituted"] == 1 and terms["before"]["errors"] == 0
    assert terms["after"]["occurrences"] == 1
    md = render_all(report)["report.md"]
    assert "| numbers | 2 | 0 | 0.00% | 3 | 150.00% | 3 |" in md
    assert "| negations | 2 | 1 | 50.00% | 1 | 50.00% | 1 |" in md
    assert "Worse on negations: u1" in md


def test_deleted_phrase_and_no_occurrences() -> None:
    cls = CriticalClass("t", frozenset({("no", "entry")}))
    # the whole phrase deleted counts once, as deleted; a partly deleted one as substituted
    assert count_alignment(cls, align(["no", "entry", "here"], ["here"])).deleted == 1
    part = count_alignment(cls, align(["no", "entry", "here"], ["entry", "here"]))
    assert (part.substituted, part.deleted) == (1, 0)
    none = count_alignment(cls, align(["open"], ["open"]))
    assert none.occurrences == 0 and none.error_rate is None


@pytest.mark.parametrize(("word", "number"), [
    ("14", True), ("2.5", True), ("3rd", True), ("forty-five", True), ("fourteen", True),
    ("hundred", True), ("oh", False), ("second", False), ("bay", False), ("-", False),
])
def test_number_words(word: str, number: bool) -> None:
    # "oh" and "second" are left out on purpose: outside numbers they are ordinary words
    assert is_number_word(word) is number


@pytest.mark.parametrize(("word", "negation"), [
    ("not", True), ("don't", True), ("cannot", True), ("without", True), ("n't", False),
    ("note", False), ("know", False),
])
def test_negation_words(word: str, negation: bool) -> None:
    assert is_negation_word(word) is negation


def test_terms_file_extends_a_builtin_class(tmp_path: Path) -> None:
    path = tmp_path / "terms.txt"
    path.write_text("# drugs and words of refusal\nMetoprolol\n\nnegations\tsans\n"
                    "no entry\n")
    terms = read_terms(path)
    assert terms == {"terms": [("metoprolol",), ("no", "entry")], "negations": [("sans",)]}
    negations = {c.name: c for c in classes_with_terms(terms)}["negations"]
    assert negations.spans(["coffee", "sans", "sugar", "not"]) == [(1, 2), (3, 4)]


def test_terms_file_line_without_words(tmp_path: Path) -> None:
    path = tmp_path / "terms.txt"
    path.write_text("pump\n?!\n")
    with pytest.raises(InputError) as err:
        read_terms(path)
    assert str(err.value) == f"{path}:2: term: no words left after normalisation in '?!'"
