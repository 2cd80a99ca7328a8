"""The choice rules behind ``--choose``: what text each list outputs, and how sure of
every output word we are.

- ``best``: the highest combined score (ties to the earlier hypothesis).
- ``min-risk``: the lowest expected word errors (:mod:`rescore.decode.risk`).
- ``consensus``: the heaviest word of every confusion-network bin
  (:mod:`rescore.decode.network`).

The confidence of a chosen word is its posterior: for ``consensus`` its bin's posterior;
for ``best`` and ``min-risk`` the summed posterior of the hypotheses that hold the same
word at the aligned position (each hypothesis aligned to the chosen one by a minimum-edit
word alignment; the chosen one counts itself).
"""

from __future__ import annotations

from collections.abc import Sequence
from dataclasses import dataclass
from typing import Literal, get_args

import numpy as np

from rescore.decode.network import consensus_words
from rescore.decode.posterior import posteriors
from rescore.decode.risk import min_risk_rows
from rescore.decode.words import Codebook, edits
from rescore.scoring import segment_argmax

Rule = Literal["best", "min-risk", "consensus"]
RULES: tuple[str, ...] = get_args(Rule)


@dataclass(frozen=True)
class Decision:
    """What a rule chose for every list.

    ``rows[u]`` is the global row of the chosen hypothesis, or -1 under ``consensus``
    (whose output need not be any one hypothesis); ``words[u]`` the output words and
    ``confidences[u]`` their posteriors, one per word.
    """

    rule: str
    rows: np.ndarray
    words: tuple[tuple[str, ...], ...]
    confidences: tuple[tuple[float, ...], ...]

    def texts(self) -> list[str]:
        return [" ".join(w) for w in self.words]

    def word_confidences(self, u: int) -> list[list[str | float]]:
        """``[[word, posterior], ...]`` of list ``u``: the rescored output's field."""
        return [[w, c] for w, c in zip(self.words[u], self.confidences[u], strict=True)]


def word_posteriors(codes: Sequence[str], post: np.ndarray, pivot: int) -> np.ndarray:
    """Posterior of each word of hypothesis ``pivot`` (an index into ``codes``): the summed
    posterior of the hypotheses that hold that word at the aligned position."""
    target = codes[pivot]
    weights = post.tolist()
    # every hypothesis holds every pivot word except where it replaces or deletes one
    conf = [float(sum(weights))] * len(target)
    for other, p in zip(codes, weights, strict=True):
        for tag, i, _ in edits(target, other):
            if tag != "insert":
                conf[i] -= p
    return np.clip(np.array(conf, dtype=np.float64), 0.0, 1.0)


def decide(hypotheses: Sequence[Sequence[str]], offsets: np.ndarray, totals: np.ndarray,
           *, scale: float, rule: Rule = "best") -> Decision:
    """Apply a choice rule to every list.

    Parameters
    ----------
    hypotheses : the normalised words of every hypothesis, all lists end to end.
    offsets : list ``u`` owns rows ``offsets[u]:offsets[u + 1]`` (at least one each).
    totals : the combined score of every row.
    scale : the posterior scale (:func:`rescore.decode.posterior.posteriors`).
    rule : ``best``, ``min-risk`` or ``consensus``.

    Returns
    -------
    Decision

    Raises
    ------
    ValueError
        For an unknown rule or inconsistent shapes.
    """
    if rule not in RULES:
        raise ValueError(f"unknown choice rule {rule!r}; expected one of {', '.join(RULES)}")
    offsets = np.asarray(offsets, dtype=np.int64)
    totals = np.asarray(totals, dtype=np.float64)
    if len(hypotheses) != len(totals):
        raise ValueError(f"{len(hypotheses)} hypotheses for {len(totals)} totals")
    post = posteriors(totals, offsets, scale)
    book = Codebook()
    codes = book.encode_many(hypotheses)
    n = len(offsets) - 1
    words: list[tuple[str, ...]] = []
    confs: list[tuple[float, ...]] = []
    if rule == "consensus":
        rows = np.full(n, -1, dtype=np.int64)
        for u in range(n):
            a, b = int(offsets[u]), int(offsets[u + 1])
            w, c = consensus_words(codes[a:b], post[a:b], book)
            words.append(tuple(w))
            confs.append(tuple(c))
    else:
        rows = (segment_argmax(totals, offsets) if rule == "best"
                else min_risk_rows(codes, offsets, post)[0])
        for u in range(n):
            a, b = int(offsets[u]), int(offsets[u + 1])
            r = int(rows[u])
            words.append(tuple(hypotheses[r]))
            confs.append(tuple(word_posteriors(codes[a:b], post[a:b], r - a).tolist()))
    return Decision(rule=rule, rows=rows, words=tuple(words), confidences=tuple(confs))
