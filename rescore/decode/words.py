"""Words as single characters, so that C-speed string edit distances work on word lists.

Each distinct word of a batch gets one code point (skipping the surrogate block), and a
word sequence becomes a string of them; rapidfuzz's Levenshtein distance and opcodes on
those strings are then word edit distances and word alignments.
"""

from __future__ import annotations

from collections.abc import Sequence
from typing import cast

from rapidfuzz.distance import Levenshtein

_FIRST = 0x21
_SURROGATES = range(0xD800, 0xE000)


class Codebook:
    """Words to one-character codes and back; grows as new words are met."""

    def __init__(self) -> None:
        self._code: dict[str, str] = {}
        self._word: dict[str, str] = {}

    def _new(self, word: str) -> str:
        n = _FIRST + len(self._code)
        if n >= _SURROGATES.start:
            n += len(_SURROGATES)
        if n > 0x10FFFF:
            raise ValueError("more distinct words than Unicode code points")
        code = chr(n)
        self._code[word] = code
        self._word[code] = word
        return code

    def encode(self, words: Sequence[str]) -> str:
        try:
            return "".join(map(self._code.__getitem__, words))
        except KeyError:  # a new word: the slower path, once per distinct word
            get = self._code.get
            return "".join([get(w) or self._new(w) for w in words])

    def encode_many(self, lists: Sequence[Sequence[str]]) -> list[str]:
        return [self.encode(words) for words in lists]

    def word(self, code: str) -> str:
        return self._word[code]

    def decode(self, codes: str) -> list[str]:
        return [self._word[c] for c in codes]


def edits(pivot: str, other: str) -> list[tuple[str, int, int]]:
    """``(tag, pivot position, other position)`` of one minimum-edit alignment of ``other``
    to ``pivot`` (rapidfuzz's choice among equally short ones); tags ``replace``,
    ``delete`` (a pivot word ``other`` lacks) and ``insert`` (a word of ``other`` before
    pivot position ``i``, or at the end when ``i == len(pivot)``). Every pivot position no
    ``replace`` or ``delete`` names is matched to the same word in ``other``."""
    if pivot == other:
        return []
    # as_list gives plain (tag, src, dest) tuples at run time; the stubs call them Editop
    return cast("list[tuple[str, int, int]]", Levenshtein.editops(pivot, other).as_list())
