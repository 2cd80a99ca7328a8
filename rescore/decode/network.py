"""Word confusion networks from an N-best list, and consensus decoding over them
(Mangu, Brill and Stolcke 2000).

Construction (ours, simpler than the paper's clustering of lattice links): the list's
highest-posterior hypothesis is the pivot. Every hypothesis, the pivot included, is
aligned to the pivot by one minimum-edit word alignment. Each pivot word owns a *slot*
bin: a hypothesis adds its posterior to the word it aligns there (a match or a
substitution) or to the empty word (a deletion). Words a hypothesis inserts before pivot
word ``i`` go to *insertion* bins in the gap before slot ``i``, the k-th inserted word of
that gap to the gap's k-th bin; the hypotheses that insert nothing there give the bin's
empty word the rest of the mass. Consensus takes the heaviest word of every bin in order
(ties go to the pivot's word in a slot and to the empty word in a gap) and leaves out the
empty words, so the output may be a sequence that no hypothesis holds.

Known limits: the network is only as good as alignments to one pivot (two hypotheses that
agree with each other where the pivot differs are not aligned to each other beyond what
the pivot alignment gives); insertions in one gap are binned by their order, not by their
words; among equally short alignments rapidfuzz's choice decides which bin a word joins.
"""

from __future__ import annotations

from collections.abc import Sequence
from dataclasses import dataclass

import numpy as np

from rescore.decode.words import Codebook, edits

EMPTY = ""


@dataclass(frozen=True)
class ConfusionNetwork:
    """The bins of one list in order; each bin maps words (``""`` the empty word) to
    summed posteriors. ``slot[i]`` is True for a pivot word's bin, False for an
    insertion bin."""

    bins: tuple[dict[str, float], ...]
    slot: tuple[bool, ...]

    def best(self) -> tuple[list[str], list[float]]:
        """The heaviest word of each bin with its posterior, empty words left out."""
        words: list[str] = []
        confidences: list[float] = []
        for b in self.bins:
            word = max(b, key=b.__getitem__)  # first key wins ties: see the module rule
            if word != EMPTY:
                words.append(word)
                confidences.append(min(b[word], 1.0))  # rounding can pass 1
        return words, confidences


Bins = tuple[list[dict[str, float]], dict[int, list[dict[str, float]]]]


def _coded_bins(pivot: str, codes: Sequence[str], post: np.ndarray) -> Bins:
    """Slot bins (one per pivot position) and insertion bins (per gap, in order) of coded
    words; the first key of a slot is the pivot's word, of an insertion bin the empty word,
    so that ``max`` over keys breaks ties by the module's rule."""
    weights = post.tolist()
    total = float(sum(weights))
    # every hypothesis holds the pivot's word in a slot unless it replaces or deletes it
    removed = [0.0] * len(pivot)
    rivals: dict[int, dict[str, float]] = {}
    gaps: dict[int, list[dict[str, float]]] = {}
    for other, p in zip(codes, weights, strict=True):
        gap, k = -1, 0
        for tag, i, j in edits(pivot, other):
            if tag == "insert":
                if i != gap:
                    gap, k = i, 0
                bins = gaps.setdefault(i, [])
                if k == len(bins):
                    bins.append({EMPTY: 0.0})
                b, w = bins[k], other[j]
                b[w] = b.get(w, 0.0) + p
                k += 1
            else:
                removed[i] += p
                b = rivals.setdefault(i, {})
                w = other[j] if tag == "replace" else EMPTY
                b[w] = b.get(w, 0.0) + p
    slots = [{c: total - removed[i], **rivals.get(i, {})} for i, c in enumerate(pivot)]
    for bins in gaps.values():
        for b in bins:
            b[EMPTY] = total - sum(b.values())
    return slots, gaps


def _ordered(pivot: str, bins: Bins) -> list[tuple[bool, dict[str, float]]]:
    """``(is_slot, bin)`` in output order: each gap's insertion bins before its slot."""
    slots, gaps = bins
    out: list[tuple[bool, dict[str, float]]] = []
    for i in range(len(pivot) + 1):
        out.extend((False, b) for b in gaps.get(i, ()))
        if i < len(pivot):
            out.append((True, slots[i]))
    return out


def build_network(hypotheses: Sequence[Sequence[str]], post: np.ndarray,
                  codebook: Codebook | None = None) -> ConfusionNetwork:
    """The confusion network of one list (words per hypothesis, posteriors summing to 1)."""
    book = codebook or Codebook()
    codes = book.encode_many(hypotheses)
    post = np.asarray(post, dtype=np.float64)
    pivot = codes[int(np.argmax(post))]
    ordered = _ordered(pivot, _coded_bins(pivot, codes, post))
    return ConfusionNetwork(
        bins=tuple({(book.word(c) if c else EMPTY): v for c, v in b.items()}
                   for _, b in ordered),
        slot=tuple(is_slot for is_slot, _ in ordered))


def consensus_words(codes: Sequence[str], post: np.ndarray, book: Codebook,
                    ) -> tuple[list[str], list[float]]:
    """Consensus words of one coded list and their bin posteriors (as
    ``build_network(...).best()``, without spelling out the losing words)."""
    pivot = codes[int(np.argmax(post))]
    words: list[str] = []
    confidences: list[float] = []
    for _, b in _ordered(pivot, _coded_bins(pivot, codes, post)):
        code = max(b, key=b.__getitem__)
        if code != EMPTY:
            words.append(book.word(code))
            confidences.append(min(b[code], 1.0))  # rounding can pass 1
    return words, confidences
