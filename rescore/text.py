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
from dataclasses import dataclass
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


def tokens_many(texts: Sequence[str]) -> Sequence[list[str]]:
    """``tokens`` of each text. A batch is normalised in one pass as a block of lines
    (:func:`normalise_block`) into :class:`Words`; a batch with a line break inside a
    text (or a lone surrogate, which has no UTF-8 form) text by text."""
    joined = "\n".join(texts)
    if texts and joined.count("\n") == len(texts) - 1:
        try:
            data = joined.encode("utf-8")
        except UnicodeEncodeError:
            return [tokens(text) for text in texts]
        return clean_words(normalise_block(data))
    return [tokens(text) for text in texts]


# --- whole blocks of lines at once ---------------------------------------------------------
# A block is many lines joined by "\n". Its clean form (see normalise_block) has the same
# lines, each holding exactly the words ``tokens`` finds in it, separated by runs of spaces:
# no other white space, no punctuation but word-internal ' and -.

_SPACE, _NEWLINE, _APOSTROPHE, _HYPHEN = 32, 10, 39, 45


def _ascii_block_table() -> bytes:
    """Bytes to bytes: uppercase ASCII to lowercase, white space but the newline and each
    punctuation character but ' and - to a space (as ``str.lower``, ``str.split`` and
    ``_ASCII_TABLE`` treat them); bytes 128-255 unchanged."""
    out = bytearray(range(256))
    for c in range(128):
        ch = chr(c)
        if ch != "\n" and (ch.isspace() or c in _ASCII_TABLE):
            out[c] = _SPACE
        else:
            out[c] = ord(ch.lower())
    return bytes(out)


_ASCII_BLOCK = _ascii_block_table()
_ASCII_BYTES = bytes(range(128))


def _space_out_non_ascii(data: bytes) -> bytes:
    """Each non-ASCII character of UTF-8 ``data`` that is punctuation or white space
    replaced by a space (one ``bytes.replace`` per distinct such character: UTF-8 is
    self-synchronising, so a character's bytes match only where that character is)."""
    for ch in set(data.translate(None, _ASCII_BYTES).decode("utf-8")):
        if ch.isspace() or unicodedata.category(ch).startswith("P"):
            data = data.replace(ch.encode("utf-8"), b" ")
    return data


def _strip_word_edges(data: bytes) -> bytes:
    """Blank each run of ' and - that begins or ends a word (``str.strip("'-")`` of every
    word). Works on UTF-8 as on ASCII: a multibyte character holds no ASCII byte."""
    b = np.frombuffer(data, dtype=np.uint8)
    at = np.flatnonzero((b == _APOSTROPHE) | (b == _HYPHEN))
    if not at.size:
        return data
    # runs of consecutive positions: [first[i], last[i]]
    breaks = np.flatnonzero(np.diff(at) != 1)
    first = at[np.concatenate(([0], breaks + 1))]
    last = at[np.concatenate((breaks, [len(at) - 1]))]
    before = b[np.maximum(first - 1, 0)]
    after = b[np.minimum(last + 1, len(b) - 1)]
    opens = (first == 0) | (before == _SPACE) | (before == _NEWLINE)
    closes = (last == len(b) - 1) | (after == _SPACE) | (after == _NEWLINE)
    edge = opens | closes
    if not edge.any():
        return data
    run_of = np.cumsum(np.concatenate(([0], np.diff(at) != 1)))
    out = b.copy()
    out[at[edge[run_of]]] = _SPACE
    return out.tobytes()


def normalise_block(data: bytes) -> bytes:
    """The clean form of ``data``, UTF-8 lines joined by ``\\n``: the same lines, each
    holding the words ``tokens`` finds in it, separated by one or more spaces.

    Equal, line for line, to ``tokens`` (property tests check this on random text): NFC,
    lowercase, U+2019 to ``'``, punctuation and white space to spaces, ``'`` and ``-``
    stripped from the ends of words. Pure-ASCII blocks, the common case, take one byte
    translation; NFC and the typographic apostrophe are no-ops there.
    """
    clean = _clean_ascii(data) if data.isascii() else _clean_unicode(data)
    if b"'" in clean or b"-" in clean:
        clean = _strip_word_edges(clean)
    return clean


def _clean_ascii(data: bytes) -> bytes:
    return data.translate(_ASCII_BLOCK)


def _clean_unicode(data: bytes) -> bytes:
    # NFC, lower() and the per-character rules never act across a newline (a starter that
    # composes with nothing, neither cased nor case-ignorable), so a whole block normalises
    # as its lines do one by one
    text = unicodedata.normalize("NFC", data.decode("utf-8")).lower().replace("\u2019", "'")
    # the ASCII rules act on the ASCII bytes of UTF-8 (every byte of a multibyte
    # character is 128 or more); lower() has left no ASCII capital to change
    return _space_out_non_ascii(text.encode("utf-8").translate(_ASCII_BLOCK))


_SEPARATOR = np.zeros(256, dtype=bool)
_SEPARATOR[[_SPACE, _NEWLINE]] = True


@dataclass(frozen=True)
class BlockWords:
    """Where the words of a clean block are: byte ``starts`` and ``ends`` of every word, in
    order, and ``counts`` of words on each line."""

    starts: npt.NDArray[np.int64]
    ends: npt.NDArray[np.int64]
    counts: npt.NDArray[np.int64]


def block_words(clean: bytes) -> BlockWords:
    """Find the words of a clean block (see :func:`normalise_block`) as numpy operations."""
    b = np.frombuffer(clean, dtype=np.uint8)
    inside = ~_SEPARATOR[b]
    edges = np.flatnonzero(inside[1:] != inside[:-1]) + 1
    if len(b) and inside[0]:
        edges = np.concatenate(([0], edges))
    if len(b) and inside[-1]:
        edges = np.concatenate((edges, [len(b)]))
    starts, ends = edges[0::2], edges[1::2]
    line_ends = np.append(np.flatnonzero(b == _NEWLINE), len(b))
    upto = np.searchsorted(starts, line_ends)
    counts = np.diff(upto, prepend=0)
    return BlockWords(starts.astype(np.int64), ends.astype(np.int64), counts.astype(np.int64))


def clean_words(clean: bytes) -> Words:
    """The words of each line of a clean block, as :class:`Words`."""
    found = block_words(clean)
    bounds = np.zeros(len(found.counts) + 1, dtype=np.int64)
    np.cumsum(found.counts, out=bounds[1:])
    return Words(clean.decode("utf-8").split(), bounds)


def word_counts(words: Sequence[Sequence[str]]) -> npt.NDArray[np.int64]:
    """The number of words of each text."""
    if isinstance(words, Words):
        return words.lengths()
    return np.fromiter(map(len, words), dtype=np.int64, count=len(words))


def normalise(text: str) -> str:
    """The normalised form of ``text`` as one string of space-separated words."""
    return " ".join(tokens(text))
