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
from rapidfuzz.distance import Levenshtein

from rescore.decode.words import Codebook

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


def _coded_bins(pivot: str, codes: Sequence[str], post: np.ndarray,
                ) -> tuple[list[dict[str, float]], dict[tuple[int, int], dict[str, float]]]:
    slots: list[dict[str, float]] = [{c: 0.0} for c in pivot]
    gaps: dict[tuple[int, int], dict[str, float]] = {}
    for other, p in zip(codes, post.tolist(), strict=True):
        for block in Levenshtein.opcodes(pivot, other):
            i, i2, j, j2 = block.src_start, block.src_end, block.dest_start, block.dest_end
            tag = block.tag
            if tag == "equal" or tag == "replace":
                for t in range(i2 - i):
                    b = slots[i + t]
                    w = other[j + t]
                    b[w] = b.get(w, 0.0) + p
            elif tag == "delete":
                for t in range(i, i2):
                    b = slots[t]
                    b[EMPTY] = b.get(EMPTY, 0.0) + p
            elif tag == "insert":
                for k in range(j2 - j):
                    b = gaps.setdefault((i, k), {EMPTY: 0.0})
                    w = other[j + k]
                    b[w] = b.get(w, 0.0) + p
    total = float(post.sum())
    for b in gaps.values():
        b[EMPTY] = total - sum(b.values())
    return slots, gaps


def build_network(hypotheses: Sequence[Sequence[str]], post: np.ndarray,
                  codebook: Codebook | None = None) -> ConfusionNetwork:
    """The confusion network of one list (words per hypothesis, posteriors summing to 1)."""
    book = codebook or Codebook()
    codes = book.encode_many(hypotheses)
    return _network(codes, np.asarray(post, dtype=np.float64), book)


def _network(codes: Sequence[str], post: np.ndarray, book: Codebook) -> ConfusionNetwork:
    pivot = codes[int(np.argmax(post))]
    slots, gaps = _coded_bins(pivot, codes, post)
    bins: list[dict[str, float]] = []
    slot: list[bool] = []
    by_gap: dict[int, list[tuple[int, dict[str, float]]]] = {}
    for (g, k), b in gaps.items():
        by_gap.setdefault(g, []).append((k, b))
    for i in range(len(pivot) + 1):
        for _, b in sorted(by_gap.get(i, []), key=lambda kb: kb[0]):
            bins.append({(book.word(c) if c else EMPTY): v for c, v in b.items()})
            slot.append(False)
        if i < len(pivot):
            bins.append({(book.word(c) if c else EMPTY): v for c, v in slots[i].items()})
            slot.append(True)
    return ConfusionNetwork(bins=tuple(bins), slot=tuple(slot))


def consensus_words(codes: Sequence[str], post: np.ndarray, book: Codebook,
                    ) -> tuple[list[str], list[float]]:
    """Consensus words of one coded list and their bin posteriors."""
    return _network(codes, post, book).best()
