"""Critical words: errors on the words that change what a transcript means, counted apart.

A WER treats "fourteen" -> "forty" and "the" -> "a" alike; a release review needs the
errors on quantities and negations, and on the user's own terms, on their own. A class is
a set of terms (single words or phrases, normalised like the references) and, for the
built-in ``numbers``, a rule for digit strings. On each system's existing word alignment
(:mod:`rescore.wer`, not re-aligned here) a class counts:

- ``occurrences``: the class's terms found in the references (left to right, the longest
  term first, not overlapping);
- ``substituted``: occurrences with a word substituted (or some words deleted and others
  substituted); ``deleted``: occurrences whose every word was deleted;
- ``inserted``: terms of the class found in the hypothesis with no word aligned to an
  occurrence in the reference (inserted, or put in place of a word outside the class:
  "nut free" -> "not free" inserts a negation);
- ``errors`` = substituted + deleted + inserted, and ``error_rate`` = errors / occurrences
  (``None`` without occurrences; like a WER it can pass 1).
"""

from __future__ import annotations

import re
from collections.abc import Callable, Iterable, Mapping, Sequence
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

from rescore.errors import InputError
from rescore.readers import iter_text_lines
from rescore.report.rows import UtteranceRow
from rescore.text import tokens
from rescore.wer import Alignment

_UNITS = (
    "zero", "one", "two", "three", "four", "five", "six", "seven", "eight", "nine", "ten",
    "eleven", "twelve", "thirteen", "fourteen", "fifteen", "sixteen", "seventeen", "eighteen",
    "nineteen", "twenty", "thirty", "forty", "fifty", "sixty", "seventy", "eighty", "ninety",
    "hundred", "thousand", "million", "billion", "trillion", "dozen", "half", "quarter",
)
_ORDINALS = (
    "first", "third", "fourth", "fifth", "sixth", "seventh", "eighth", "ninth", "tenth",
    "eleventh", "twelfth", "thirteenth", "fourteenth", "fifteenth", "sixteenth", "seventeenth",
    "eighteenth", "nineteenth", "twentieth", "thirtieth", "fortieth", "fiftieth", "sixtieth",
    "seventieth", "eightieth", "ninetieth", "hundredth", "thousandth", "millionth",
)
# English number words (cardinals, scale words, ordinals except the ambiguous "second");
# "oh" and "point" are left out: outside a number they are ordinary words
NUMBER_WORDS = frozenset(_UNITS + _ORDINALS)
_DIGITS = re.compile(r"\d+(?:[.,:]\d+)*(?:st|nd|rd|th|s)?")

# a short English list; every word ending in n't (don't, isn't, won't...) counts as well
NEGATION_WORDS = frozenset((
    "no", "not", "never", "nothing", "none", "nor", "neither", "nobody", "nowhere", "noone",
    "without", "cannot",
))


def is_number_word(word: str) -> bool:
    """Digits ("14", "2.5", "3rd") or a number word, hyphenated ones too ("forty-five")."""
    if _DIGITS.fullmatch(word):
        return True
    parts = word.split("-")
    return all(p in NUMBER_WORDS for p in parts) and bool(parts[0])


def is_negation_word(word: str) -> bool:
    return word in NEGATION_WORDS or (word.endswith("n't") and len(word) > 3)


@dataclass(frozen=True)
class CriticalClass:
    """A named class of critical terms: phrases (tuples of normalised words) and, or, a rule
    for single words."""

    name: str
    terms: frozenset[tuple[str, ...]] = frozenset()
    word_rule: Callable[[str], bool] | None = field(default=None, compare=False)
    description: str = ""

    def with_terms(self, terms: Iterable[tuple[str, ...]]) -> CriticalClass:
        return CriticalClass(self.name, self.terms | frozenset(terms), self.word_rule,
                             self.description)

    def spans(self, words: Sequence[str]) -> list[tuple[int, int]]:
        """Non-overlapping ``(start, end)`` of the class's terms, longest first at each
        position, scanning left to right."""
        lengths = sorted({len(t) for t in self.terms}, reverse=True)
        out = []
        i = 0
        while i < len(words):
            hit = next((n for n in lengths
                        if i + n <= len(words) and tuple(words[i:i + n]) in self.terms), 0)
            if not hit and self.word_rule is not None and self.word_rule(words[i]):
                hit = 1
            if hit:
                out.append((i, i + hit))
                i += hit
            else:
                i += 1
        return out


def builtin_classes() -> list[CriticalClass]:
    """``numbers`` and ``negations``, the two classes every report counts."""
    return [
        CriticalClass("numbers", word_rule=is_number_word,
                      description="digit strings and English number words"),
        CriticalClass("negations", word_rule=is_negation_word,
                      description="no, not, never, nothing, none, nor, neither, nobody, "
                                  "nowhere, noone, without, cannot and every n't form"),
    ]


TERMS_CLASS = "terms"


def read_terms(path: str | Path) -> dict[str, list[tuple[str, ...]]]:
    """The terms file: one term or phrase a line, or ``CLASS<TAB>term`` to put it in a named
    class (``negations<TAB>sans`` extends a built-in one). Blank lines and lines starting
    with ``#`` are skipped; terms are normalised like references."""
    out: dict[str, list[tuple[str, ...]]] = {}
    for number, line in iter_text_lines(path):
        text = line.rstrip("\r\n")
        if not text.strip() or text.lstrip().startswith("#"):
            continue
        name, _, term = text.rpartition("\t")
        name = name.strip() or TERMS_CLASS
        words = tuple(tokens(term))
        if not words:
            raise InputError(f"no words left after normalisation in {term!r}", path=path,
                             line=number, field="term")
        out.setdefault(name, []).append(words)
    return out


def classes_with_terms(extra: Mapping[str, Sequence[tuple[str, ...]]]) -> list[CriticalClass]:
    """The built-in classes, extended or joined by the terms file's classes."""
    classes = {c.name: c for c in builtin_classes()}
    for name, terms in extra.items():
        classes[name] = classes.get(name, CriticalClass(name)).with_terms(terms)
    return list(classes.values())


@dataclass(frozen=True)
class ClassCounts:
    occurrences: int
    substituted: int
    deleted: int
    inserted: int

    @property
    def errors(self) -> int:
        return self.substituted + self.deleted + self.inserted

    @property
    def error_rate(self) -> float | None:
        return self.errors / self.occurrences if self.occurrences else None

    def to_dict(self) -> dict[str, Any]:
        return {"occurrences": self.occurrences, "errors": self.errors,
                "error_rate": self.error_rate, "substituted": self.substituted,
                "deleted": self.deleted, "inserted": self.inserted}


@dataclass(frozen=True)
class WorseUtterance:
    id: str
    before_errors: int
    after_errors: int

    def to_dict(self) -> dict[str, Any]:
        return {"id": self.id, "before_errors": self.before_errors,
                "after_errors": self.after_errors}


@dataclass(frozen=True)
class ClassResult:
    name: str
    description: str
    before: ClassCounts
    after: ClassCounts
    worse: tuple[WorseUtterance, ...]

    def to_dict(self) -> dict[str, Any]:
        return {"description": self.description, "before": self.before.to_dict(),
                "after": self.after.to_dict(), "worse": [w.to_dict() for w in self.worse]}


def count_alignment(cls: CriticalClass, alignment: Alignment) -> ClassCounts:
    """One utterance's counts for one class, read off its alignment."""
    ref_kind: list[str] = []      # per reference word: equal, substitute or delete
    hyp_ref: list[int | None] = []  # per hypothesis word: the reference word it faces
    for op in alignment.ops:
        if op.kind == "insert":
            hyp_ref.append(None)
        elif op.kind in ("equivalent", "optional"):
            # correct under the scoring rules: each reference word of the step is right,
            # each hypothesis word faces the step's first reference word
            assert op.ref is not None
            hyp_ref += [len(ref_kind)] * (0 if op.hyp is None else op.hyp.count(" ") + 1)
            ref_kind += ["equal"] * (op.ref.count(" ") + 1)
        else:
            if op.kind != "delete":
                hyp_ref.append(len(ref_kind))
            ref_kind.append(op.kind)
    ref_spans = cls.spans(alignment.reference)
    in_ref = {i for a, b in ref_spans for i in range(a, b)}
    substituted = deleted = 0
    for a, b in ref_spans:
        kinds = set(ref_kind[a:b])
        if kinds == {"delete"}:
            deleted += 1
        elif kinds != {"equal"}:
            substituted += 1
    inserted = sum(
        1 for a, b in cls.spans(alignment.hypothesis)
        if not any(hyp_ref[j] is not None and hyp_ref[j] in in_ref for j in range(a, b)))
    return ClassCounts(len(ref_spans), substituted, deleted, inserted)


def _total(counts: Iterable[ClassCounts]) -> ClassCounts:
    s = [0, 0, 0, 0]
    for c in counts:
        s = [s[0] + c.occurrences, s[1] + c.substituted, s[2] + c.deleted, s[3] + c.inserted]
    return ClassCounts(*s)


def critical_words(rows: Sequence[UtteranceRow],
                   classes: Sequence[CriticalClass]) -> tuple[ClassResult, ...]:
    """Per class, the before and after counts and the utterances that got worse on it."""
    out = []
    for cls in classes:
        before = [count_alignment(cls, u.before) for u in rows]
        after = [count_alignment(cls, u.after) for u in rows]
        worse = tuple(WorseUtterance(u.id, b.errors, a.errors)
                      for u, b, a in zip(rows, before, after, strict=True)
                      if a.errors > b.errors)
        out.append(ClassResult(cls.name, cls.description, _total(before), _total(after),
                               worse))
    return tuple(out)
