"""Minimum expected word errors over an N-best list (Stolcke, Konig and Weintraub 1997;
Goel and Byrne 2000, minimum Bayes risk with the word edit distance as the loss).

The risk of hypothesis ``h`` is ``R(h) = sum_g p(g) * d(h, g)`` over the list, ``d`` the
word edit distance; the chosen hypothesis has the lowest ``R`` (earliest on ties). The
pairwise distances of one list come from one call of rapidfuzz's ``cdist`` on the lists
coded as strings (one character per word, :mod:`rescore.decode.words`).
"""

from __future__ import annotations

from collections.abc import Sequence

import numpy as np
from rapidfuzz.distance import Levenshtein
from rapidfuzz.process import cdist


def pairwise_word_errors(codes: Sequence[str]) -> np.ndarray:
    """Square matrix of word edit distances between the coded hypotheses of one list."""
    out: np.ndarray = cdist(codes, codes, scorer=Levenshtein.distance, dtype=np.int32,
                            workers=1)
    return out


def expected_errors(codes: Sequence[str], post: np.ndarray) -> np.ndarray:
    """``R(h)`` for every hypothesis ``h`` of one list, given the list's posteriors."""
    risk: np.ndarray = pairwise_word_errors(codes) @ post
    return risk


def min_risk_rows(codes: Sequence[str], offsets: np.ndarray, post: np.ndarray,
                  ) -> tuple[np.ndarray, np.ndarray]:
    """Global row of the minimum-risk hypothesis of every list, and its expected errors."""
    n = len(offsets) - 1
    rows = np.empty(n, dtype=np.int64)
    risks = np.empty(n, dtype=np.float64)
    for u in range(n):
        a, b = int(offsets[u]), int(offsets[u + 1])
        if b - a == 1:
            rows[u], risks[u] = a, 0.0
            continue
        risk = expected_errors(codes[a:b], post[a:b])
        k = int(np.argmin(risk))
        rows[u], risks[u] = a + k, float(risk[k])
    return rows, risks
