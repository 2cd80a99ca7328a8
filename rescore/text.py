"""Text normalisation, applied identically to LM training text, hypotheses and references.

The default, documented in the README:
1. Unicode NFC;
2. lowercase;
3. the typographic apostrophe (U+2019) becomes ``'``;
4. every punctuation character (Unicode category P*) becomes a space, except ``'`` and
   ``-``, which survive only inside a word (``don't``, ``re-seed``; a leading or trailing
   one is stripped);
5. whitespace collapsed to single spaces, ends trimmed.
Symbols (category S*: ``$``, ``+``, ``°``) and digits are kept; ``%`` and ``#`` are
punctuation (Po) and go.
"""

from __future__ import annotations

import re
import unicodedata
from collections.abc import Sequence
from typing import overload

import numpy as np
import numpy.typing as npt

NORMALISATION = "nfc-lower-strip-punct-v1"

_KEEP_INSIDE = "'-"
_ASCII_TABLE = str.maketrans({
    chr(c): " " for c in range(128)
    if unicodedata.category(chr(c)).startswith("P") and chr(c) not in _KEEP_INSIDE
})


def _strip_unicode_punct(text: str) -> str:
    out = []
    for ch in text:
        if ch in _KEEP_INSIDE:
            out.append(ch)
        elif unicodedata.category(ch).startswith("P"):
            out.append(" ")
        else:
            out.append(ch)
    return "".join(out)


# any ASCII punctuation, ' and - included: text without it needs only lower() and split()
_ASCII_PUNCT = re.compile("[" + re.escape("".join(
    chr(c) for c in range(128) if unicodedata.category(chr(c)).startswith("P"))) + "]")


def tokens(text: str) -> list[str]:
    """The normalised words of ``text``."""
    if text.isascii():
        if _ASCII_PUNCT.search(text) is None:  # the common case: plain lowercase words
            return text.lower().split()
        text = text.lower().translate(_ASCII_TABLE)
    else:
        text = unicodedata.normalize("NFC", text).lower().replace("\u2019", "'")
        text = _strip_unicode_punct(text)
    words = []
    for word in text.split():
        word = word.strip(_KEEP_INSIDE)
        if word:
            words.append(word)
    return words


class Words(Sequence[list[str]]):
    """The words of many texts, held as one flat list and where each text's words begin.

    ``words[i]`` is the list of text ``i``'s words; ``flat`` and ``bounds`` (``len + 1``
    offsets into ``flat``) serve code that works on the whole batch at once.
    """

    __slots__ = ("bounds", "flat")

    def __init__(self, flat: list[str], bounds: npt.NDArray[np.int64]) -> None:
        self.flat = flat
        self.bounds = bounds

    def __len__(self) -> int:
        return len(self.bounds) - 1

    @overload
    def __getitem__(self, i: int) -> list[str]: ...

    @overload
    def __getitem__(self, i: slice) -> list[list[str]]: ...

    def __getitem__(self, i: int | slice) -> list[str] | list[list[str]]:
        if isinstance(i, slice):
            return [self[j] for j in range(*i.indices(len(self)))]
        if i < 0:
            i += len(self)
        if not 0 <= i < len(self):
            raise IndexError(i)
        return self.flat[int(self.bounds[i]):int(self.bounds[i + 1])]

    def lengths(self) -> npt.NDArray[np.int64]:
        return np.diff(self.bounds)


# str.split() separates words at these ASCII characters
_ASCII_SPACE = np.array([chr(c).isspace() for c in range(128)], dtype=bool)


def _word_bounds(data: bytes, n_texts: int) -> npt.NDArray[np.int64]:
    """Offsets of each line's first word among all words of ``data`` (lines split at
    ``\\n``), counted as ``str.split`` counts them, as numpy operations over the bytes."""
    b = np.frombuffer(data, dtype=np.uint8)
    space = _ASCII_SPACE[b]
    begins = ~space
    begins[1:] &= space[:-1]  # a word begins after a space or at the start
    starts = np.flatnonzero(begins)
    line_ends = np.append(np.flatnonzero(b == 10), len(b))
    bounds = np.zeros(n_texts + 1, dtype=np.int64)
    bounds[1:] = np.searchsorted(starts, line_ends)
    return bounds


def tokens_many(texts: Sequence[str]) -> Sequence[list[str]]:
    """``tokens`` of each text. A batch of plain ASCII words (the common case) is split in
    one pass into :class:`Words`; anything else text by text."""
    joined = "\n".join(texts)
    if texts and joined.isascii() and _ASCII_PUNCT.search(joined) is None and \
            joined.count("\n") == len(texts) - 1:
        low = joined.lower()
        words = Words(low.split(), _word_bounds(low.encode("ascii"), len(texts)))
        if int(words.bounds[-1]) == len(words.flat):
            return words
    return [tokens(text) for text in texts]


def word_counts(words: Sequence[Sequence[str]]) -> npt.NDArray[np.int64]:
    """The number of words of each text."""
    if isinstance(words, Words):
        return words.lengths()
    return np.fromiter(map(len, words), dtype=np.int64, count=len(words))


def normalise(text: str) -> str:
    """The normalised form of ``text`` as one string of space-separated words."""
    return " ".join(tokens(text))
