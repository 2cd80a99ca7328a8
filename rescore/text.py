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


def tokens_many(texts: Sequence[str]) -> list[list[str]]:
    """``tokens`` of each text; one pass over the whole batch when it is plain ASCII words."""
    joined = "\n".join(texts)
    if joined.isascii() and _ASCII_PUNCT.search(joined) is None and \
            joined.count("\n") == len(texts) - 1:
        return [line.split() for line in joined.lower().split("\n")] if texts else []
    return [tokens(text) for text in texts]


def normalise(text: str) -> str:
    """The normalised form of ``text`` as one string of space-separated words."""
    return " ".join(tokens(text))
