"""Words as single characters, so that C-speed string edit distances work on word lists.

Each distinct word of a batch gets one code point (skipping the surrogate block), and a
word sequence becomes a string of them; rapidfuzz's Levenshtein distance and opcodes on
those strings are then word edit distances and word alignments.
"""

from __future__ import annotations

from collections.abc import Sequence

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
        get = self._code.get
        return "".join([get(w) or self._new(w) for w in words])

    def encode_many(self, lists: Sequence[Sequence[str]]) -> list[str]:
        return [self.encode(words) for words in lists]

    def word(self, code: str) -> str:
        return self._word[code]

    def decode(self, codes: str) -> list[str]:
        return [self._word[c] for c in codes]


def aligned_equal(pivot: str, other: str) -> list[tuple[int, int]]:
    """``(start, stop)`` ranges of ``pivot`` positions matched to the same word in ``other``
    by one minimum-edit alignment (rapidfuzz's choice among equally short ones)."""
    return [(b.src_start, b.src_end) for b in Levenshtein.opcodes(pivot, other)
            if b.tag == "equal"]
