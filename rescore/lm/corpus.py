"""Reading text for the models: files to blocks of clean lines, and on to sentences.

One normalised sentence per non-blank line; the blocks (see
:func:`rescore.text.normalise_block`) let the model turn whole runs of lines into ids
without a str per word.
"""

from __future__ import annotations

from collections.abc import Callable, Iterable, Iterator, Sequence
from itertools import pairwise
from pathlib import Path

from rescore.errors import InputError
from rescore.readers import iter_text_blocks
from rescore.text import clean_words, normalise_block


class Corpus(Iterator[list[str]]):
    """One normalised sentence per non-blank line of each file (.gz read transparently).

    Iterate for the sentences' word lists, or take :meth:`blocks` (once, instead) for
    whole blocks of lines in their clean form (:func:`rescore.text.normalise_block`).
    ``progress`` is called with the number of lines read since its last call (after each
    block, a few hundred thousand lines at most). Text with no word at all is refused with
    an :class:`InputError` once it has been read.
    """

    def __init__(self, paths: Sequence[str | Path],
                 progress: Callable[[int], None] | None = None) -> None:
        self.paths = paths
        self.progress = progress
        self._sentences: Iterator[list[str]] | None = None
        self._started = False

    @property
    def unread(self) -> bool:
        """True until the sentences or the blocks are first asked for: the blocks are
        read from the files' start, so only an unread corpus gives its text as blocks."""
        return self._sentences is None and not self._started

    def blocks(self) -> Iterator[tuple[int, bytes]]:
        """``(first line number, clean block)`` for runs of whole lines of each file."""
        self._started = True
        any_words = False
        for path in self.paths:
            for first_line, data in iter_text_blocks(path):
                clean = normalise_block(data)
                any_words = any_words or bool(clean.strip(b" \n"))
                yield first_line, clean
                if self.progress is not None:
                    self.progress(data.count(b"\n") + 1)
        if not any_words:  # nothing to train on or measure: say so rather than give a void model
            raise InputError("no sentences (every line is blank or has no words)",
                             path=", ".join(str(p) for p in self.paths) or None)

    def _each_sentence(self) -> Iterator[list[str]]:
        for _, clean in self.blocks():
            words = clean_words(clean)
            flat, bounds = words.flat, words.bounds.tolist()
            for a, b in pairwise(bounds):
                if b > a:
                    yield flat[a:b]

    def __iter__(self) -> Corpus:
        return self

    def __next__(self) -> list[str]:
        if self._sentences is None:
            self._sentences = self._each_sentence()
        return next(self._sentences)


def read_corpus(paths: str | Path | Iterable[str | Path], *,
                progress: Callable[[int], None] | None = None) -> Corpus:
    """One normalised sentence per non-blank line of each file (.gz read transparently).

    ``progress`` is called with the number of lines read since its last call. See
    :class:`Corpus`.
    """
    if isinstance(paths, (str, Path)):
        paths = [paths]
    return Corpus(list(paths), progress)


def char_sentences(sentences: Iterable[Sequence[str]]) -> Iterator[list[str]]:
    """Each sentence's characters, the spaces between its words dropped: the tokens of a
    character model (``lm build --unit char``)."""
    for words in sentences:
        yield [c for w in words for c in w]


__all__ = ["Corpus", "char_sentences", "read_corpus"]
