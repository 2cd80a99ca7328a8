"""Alignment under scoring rules: a weighted edit distance honouring equivalent spellings,
optional words and ignored tokens (the rules themselves are read in :mod:`rescore.rules`).

Without rules that change the alignment, :func:`align_with_rules` is
:func:`rescore.wer.align_many` itself (jiwer underneath), so results stay exactly today's.
With them, ignored tokens are removed from both sides; an utterance that no other rule
touches (no optional word in its reference, no spelling of a group on both sides) is then
aligned by :func:`~rescore.wer.align_many` too, so rules change only the utterances they
apply to (and cost little time on the rest). The others get one dynamic programme over the
normalised tokens, with steps:

=============  =================================  ======  ===============================
step           consumes (reference, hypothesis)    errors  counted as
=============  =================================  ======  ===============================
equal          1, 1 (same word)                    0       1 hit
equivalent     a spelling of a group, another      0       one hit per reference word
               spelling of the same group
optional       1, 0 (an optional reference word)   0       1 hit (no deletion)
substitute     1, 1                                1       1 substitution
delete         1, 0                                1       1 deletion
insert         0, 1                                1       1 insertion
=============  =================================  ======  ===============================

Ignored tokens are removed from both sides first. An optional word the hypothesis does say
is matched as usual (a hit, or a substitution); an optional word in the hypothesis alone is
an insertion. So the reference-word count of an utterance is its number of tokens after
the ignored ones go, the same whatever the hypothesis, and before/after systems stay paired.

Among alignments with the fewest errors the programme takes, in this order, the most words
matched (equal or equivalent; an optional word skipped does not count here, so "um" heard
as "uh" is a substitution rather than a skip and an insertion), then the largest sum of
character similarities of the substituted pairs (as in :mod:`rescore.wer`'s tie-break).
The cost is that lexicographic triple, compared exactly (no weights to tune).
"""

from __future__ import annotations

from collections.abc import Sequence
from dataclasses import dataclass

import numpy as np
from rapidfuzz.distance import Indel
from rapidfuzz.process import cdist

from rescore.rules import ScoringRules
from rescore.wer import Alignment, WordOp, align_many

# (errors, -words matched, -similarity of substituted pairs): smaller is better
_Cost = tuple[int, int, float]
_START: _Cost = (0, 0, 0.0)
_WORST: _Cost = (1 << 62, 0, 0.0)


@dataclass(frozen=True)
class CompiledRules:
    """Rules as the aligner uses them: phrases as token tuples, each with its group."""

    phrases: dict[tuple[str, ...], int]
    longest: int
    optional: frozenset[str]
    ignore: frozenset[str]
    first_words: frozenset[str]
    # optional entries of more than one token (the characters of a word, ``unit="char"``)
    optional_phrases: frozenset[tuple[str, ...]] = frozenset()

    @classmethod
    def of(cls, rules: ScoringRules, *, unit: str = "word") -> CompiledRules:
        """The rules compiled for tokens of ``unit``: words, or (``"char"``) characters,
        where every spelling and optional entry becomes its characters, spaces dropped."""
        def toks(entry: str) -> tuple[str, ...]:
            words = rules.normalised(entry)
            return tuple("".join(words)) if unit == "char" else tuple(words)

        phrases: dict[tuple[str, ...], int] = {}
        for gid, group in enumerate(rules.equivalent):
            for spelling in group:
                words = toks(spelling)
                if words:  # a spelling is in one group only (ScoringRules checks)
                    phrases[words] = gid
        entries = {toks(entry) for entry in rules.optional}
        optional = frozenset(e[0] for e in entries if len(e) == 1)
        longer = frozenset(e for e in entries if len(e) > 1)
        # ignored tokens go before the characters are taken (see rescore.counting)
        return cls(phrases=phrases, longest=max(map(len, phrases), default=0),
                   optional=optional, ignore=frozenset(rules.ignore) if unit != "char"
                   else frozenset(), first_words=frozenset(p[0] for p in phrases),
                   optional_phrases=longer)

    def _spans(self, words: Sequence[str]) -> list[list[tuple[int, int]]]:
        """For each position, the (length, group) of every phrase that starts there."""
        out: list[list[tuple[int, int]]] = [[] for _ in words]
        if not self.phrases:
            return out
        for i in range(len(words)):
            for n in range(1, min(self.longest, len(words) - i) + 1):
                gid = self.phrases.get(tuple(words[i:i + n]))
                if gid is not None:
                    out[i].append((n, gid))
        return out

    def _optional_spans(self, words: Sequence[str]) -> list[list[int]]:
        """For each position, the length of every multi-token optional entry there."""
        out: list[list[int]] = [[] for _ in words]
        for i in range(len(words)):
            for entry in self.optional_phrases:
                if tuple(words[i:i + len(entry)]) == entry:
                    out[i].append(len(entry))
        return out

    def kept(self, words: Sequence[str]) -> list[str]:
        """``words`` without the ignored tokens."""
        return [w for w in words if w not in self.ignore]

    def touches(self, ref: Sequence[str], hyp: Sequence[str]) -> bool:
        """Whether a rule can apply: an optional reference word, or a spelling of some
        group on each side (ignored tokens already removed)."""
        if any(w in self.optional for w in ref):
            return True
        if self.optional_phrases and any(self._optional_spans(ref)):
            return True
        if not self.phrases:
            return False
        firsts = self.first_words
        return any(w in firsts for w in ref) and any(w in firsts for w in hyp) and \
            any(self._spans(ref)) and any(self._spans(hyp))

    def align(self, ref: Sequence[str], hyp: Sequence[str]) -> Alignment:
        """The alignment of one hypothesis against its reference under these rules."""
        r = [w for w in ref if w not in self.ignore]
        h = [w for w in hyp if w not in self.ignore]
        n, m = len(r), len(h)
        rs, hs = self._spans(r), self._spans(h)
        skips = self._optional_spans(r) if self.optional_phrases else [[] for _ in r]
        cost: list[list[_Cost]] = [[_WORST] * (m + 1) for _ in range(n + 1)]
        back: list[list[tuple[int, int, WordOp] | None]] = [[None] * (m + 1)
                                                             for _ in range(n + 1)]
        cost[0][0] = _START
        # every pair's character similarity at once (rapidfuzz, in C)
        sims = cdist(r, h, scorer=Indel.normalized_similarity, dtype=np.float64).tolist() \
            if n and m else []

        def relax(i: int, j: int, ni: int, nj: int, c: _Cost, op: WordOp) -> None:
            if c < cost[ni][nj]:
                cost[ni][nj] = c
                back[ni][nj] = (i, j, op)

        for i in range(n + 1):
            for j in range(m + 1):
                e, neg_hits, neg_sim = cost[i][j]
                if i < n and j < m:
                    a, b = r[i], h[j]
                    if a == b:
                        relax(i, j, i + 1, j + 1, (e, neg_hits - 1, neg_sim),
                              WordOp("equal", a, b))
                    else:
                        relax(i, j, i + 1, j + 1, (e + 1, neg_hits, neg_sim - sims[i][j]),
                              WordOp("substitute", a, b))
                if i < n:
                    if r[i] in self.optional:
                        relax(i, j, i + 1, j, (e, neg_hits, neg_sim),
                              WordOp("optional", r[i], None))
                    relax(i, j, i + 1, j, (e + 1, neg_hits, neg_sim),
                          WordOp("delete", r[i], None))
                    for lo in skips[i]:
                        relax(i, j, i + lo, j, (e, neg_hits, neg_sim),
                              WordOp("optional", " ".join(r[i:i + lo]), None))
                if j < m:
                    relax(i, j, i, j + 1, (e + 1, neg_hits, neg_sim),
                          WordOp("insert", None, h[j]))
                if i < n and j < m:
                    for lp, gp in rs[i]:
                        for lq, gq in hs[j]:
                            # the same words on both sides are hits one by one already
                            if gp == gq and r[i:i + lp] != h[j:j + lq]:
                                relax(i, j, i + lp, j + lq, (e, neg_hits - lp, neg_sim),
                                      WordOp("equivalent", " ".join(r[i:i + lp]),
                                             " ".join(h[j:j + lq])))
        ops: list[WordOp] = []
        i, j = n, m
        while (i, j) != (0, 0):
            step = back[i][j]
            assert step is not None  # every cell but the origin is reached
            i, j, op = step
            ops.append(op)
        return Alignment(tuple(reversed(ops)))


def align_with_rules(
    refs: Sequence[Sequence[str]], hyps: Sequence[Sequence[str]],
    rules: ScoringRules | None = None, *, unit: str = "word",
) -> list[Alignment]:
    """Word alignments of hypotheses against references paired by position, under
    ``rules``; with none (or rules that only normalise) exactly :func:`align_many`'s.
    ``unit="char"``: the tokens are characters (see :meth:`CompiledRules.of`)."""
    if rules is None or not rules.changes_alignment:
        return align_many(refs, hyps)
    if len(refs) != len(hyps):
        raise ValueError(f"{len(refs)} references for {len(hyps)} hypotheses")
    compiled = CompiledRules.of(rules, unit=unit)
    out: list[Alignment | None] = [None] * len(refs)
    plain: list[int] = []
    kept_r: list[list[str]] = []
    kept_h: list[list[str]] = []
    for k, (ref, hyp) in enumerate(zip(refs, hyps, strict=True)):
        r, h = compiled.kept(ref), compiled.kept(hyp)
        if compiled.touches(r, h):
            out[k] = compiled.align(r, h)
        else:
            plain.append(k)
            kept_r.append(r)
            kept_h.append(h)
    for k, al in zip(plain, align_many(kept_r, kept_h), strict=True):
        out[k] = al
    return [al for al in out if al is not None]
