"""Word error counts and corpus WER (jiwer and rapidfuzz underneath).

Inputs are already-normalised word lists (see :mod:`rescore.text`). Corpus WER is total
errors over total reference words, never a mean of per-utterance rates.
"""

from __future__ import annotations

from collections.abc import Sequence
from dataclasses import asdict, dataclass, field
from itertools import pairwise
from typing import Any, Literal

import jiwer
import numpy as np
from rapidfuzz.distance import Indel, Levenshtein

# every command refuses a reference set without words: its WER, errors over zero words,
# is undefined (one rule for wer, check, tune and report)
UNDEFINED_WER = "the references hold no words; WER is undefined"


@dataclass(frozen=True)
class WerInterval:
    """A bootstrap percentile interval of a corpus WER over utterances (see
    :func:`rescore.significance.with_interval`)."""

    low: float
    high: float
    confidence: float
    resamples: int
    seed: int


@dataclass(frozen=True)
class WerResult:
    """Corpus error counts; ``wer`` is (S + D + I) / reference words. ``interval``, when
    known, is printed beside the WER in tables; it is not one of the counts, so
    :meth:`to_dict` (the keys of ``wer --json``) leaves it out."""

    wer: float
    substitutions: int
    deletions: int
    insertions: int
    hits: int
    reference_words: int
    utterances: int
    interval: WerInterval | None = field(default=None, compare=False)

    @property
    def errors(self) -> int:
        return self.substitutions + self.deletions + self.insertions

    def to_dict(self) -> dict[str, float | int]:
        out = asdict(self)
        del out["interval"]
        return out


@dataclass(frozen=True)
class UtteranceCounts:
    """Per-utterance counts, one entry per utterance, in input order."""

    substitutions: np.ndarray
    deletions: np.ndarray
    insertions: np.ndarray
    hits: np.ndarray

    @property
    def errors(self) -> np.ndarray:
        total: np.ndarray = self.substitutions + self.deletions + self.insertions
        return total

    @property
    def reference_words(self) -> np.ndarray:
        total: np.ndarray = self.substitutions + self.deletions + self.hits
        return total


def align_counts(ref: Sequence[str], hyp: Sequence[str]) -> tuple[int, int, int, int]:
    """(substitutions, deletions, insertions, hits) of one minimum-edit alignment."""
    if not ref:
        return 0, 0, len(hyp), 0
    if not hyp:
        return 0, len(ref), 0, 0
    # jiwer's own counting (jiwer.process_words: words to ints, then rapidfuzz's opcodes),
    # without its text transforms: the words here are normalised and hold no spaces already
    ids: dict[str, int] = {}
    a = [ids.setdefault(w, len(ids)) for w in ref]
    b = [ids.setdefault(w, len(ids)) for w in hyp]
    s = d = i = 0
    for op in Levenshtein.opcodes(a, b):
        if op.tag == "replace":
            s += op.src_end - op.src_start
        elif op.tag == "delete":
            d += op.src_end - op.src_start
        elif op.tag == "insert":
            i += op.dest_end - op.dest_start
    return s, d, i, len(ref) - s - d


def word_errors(ref: Sequence[str], hyp: Sequence[str]) -> int:
    """Minimum number of word substitutions, deletions and insertions (edit distance)."""
    return int(Levenshtein.distance(list(ref), list(hyp)))


def utterance_counts(
    refs: Sequence[Sequence[str]], hyps: Sequence[Sequence[str]]
) -> UtteranceCounts:
    if len(refs) != len(hyps):
        raise ValueError(f"{len(refs)} references for {len(hyps)} hypotheses")
    table = np.zeros((4, len(refs)), dtype=np.int64)
    for i, (ref, hyp) in enumerate(zip(refs, hyps, strict=True)):
        table[:, i] = align_counts(ref, hyp)
    return UtteranceCounts(table[0], table[1], table[2], table[3])


def summarise(counts: UtteranceCounts) -> WerResult:
    return wer_from_totals(*(int(a.sum()) for a in (counts.substitutions, counts.deletions,
                                                     counts.insertions, counts.hits)),
                           utterances=len(counts.hits))


def wer_from_totals(s: int, d: int, i: int, h: int, *, utterances: int) -> WerResult:
    """Corpus WER from summed counts (so a corpus can be counted batch by batch)."""
    n = s + d + h
    return WerResult(
        wer=(s + d + i) / n if n else (0.0 if i == 0 else float("inf")),
        substitutions=s,
        deletions=d,
        insertions=i,
        hits=h,
        reference_words=n,
        utterances=utterances,
    )


def corpus_wer(refs: Sequence[Sequence[str]], hyps: Sequence[Sequence[str]]) -> WerResult:
    """Corpus WER of word lists paired by position."""
    return summarise(utterance_counts(refs, hyps))


# --- word-level alignments and character error rate -------------------------------------

OpKind = Literal["equal", "substitute", "delete", "insert", "equivalent", "optional"]


@dataclass(frozen=True)
class WordOp:
    """One step of an alignment: ``ref`` is None for an insertion, ``hyp`` for a deletion.

    Under scoring rules (:mod:`rescore.align`) two more kinds occur: ``equivalent``, where
    ``ref`` and ``hyp`` are spellings of one equivalence group (each may be a phrase, its
    words joined by single spaces), and ``optional``, an optional reference word the
    hypothesis left out (``hyp`` None; with characters as the unit an optional entry of
    several characters is one step, its characters joined by single spaces). Both are
    correct words: every reference token of theirs counts as a hit.
    """

    kind: OpKind
    ref: str | None
    hyp: str | None


_CORRECT = ("equal", "equivalent", "optional")
_PHRASES = ("equivalent", "optional")  # steps whose words are joined by single spaces


@dataclass(frozen=True)
class Alignment:
    """A minimum-edit alignment of one hypothesis against its reference, word by word."""

    ops: tuple[WordOp, ...]

    def _count(self, kind: OpKind) -> int:
        return sum(1 for op in self.ops if op.kind == kind)

    @property
    def hits(self) -> int:
        return sum(1 if op.kind == "equal" else op.ref.count(" ") + 1
                   for op in self.ops if op.kind in _CORRECT and op.ref is not None)

    @property
    def substitutions(self) -> int:
        return self._count("substitute")

    @property
    def deletions(self) -> int:
        return self._count("delete")

    @property
    def insertions(self) -> int:
        return self._count("insert")

    @property
    def errors(self) -> int:
        return sum(1 for op in self.ops if op.kind not in _CORRECT)

    @property
    def reference(self) -> list[str]:
        return [w for op in self.ops if op.ref is not None
                for w in (op.ref.split(" ") if op.kind in _PHRASES else (op.ref,))]

    @property
    def hypothesis(self) -> list[str]:
        return [w for op in self.ops if op.hyp is not None
                for w in (op.hyp.split(" ") if op.kind in _PHRASES else (op.hyp,))]

    def counts(self) -> tuple[int, int, int, int]:
        """(substitutions, deletions, insertions, hits), the order of :func:`align_counts`."""
        return self.substitutions, self.deletions, self.insertions, self.hits


def _ops_from_chunks(ref: Sequence[str], hyp: Sequence[str], chunks: Sequence[Any]) -> Alignment:
    ops = _jiwer_ops(ref, hyp, chunks)
    # only a substitution beside an insertion or a deletion leaves a choice of pairs
    types = [c.type for c in chunks]
    if any(a != b and "substitute" in (a, b) and "equal" not in (a, b)
           for a, b in pairwise(types)):
        ops = _prefer_similar(ops)
    return Alignment(tuple(ops))


def _jiwer_ops(ref: Sequence[str], hyp: Sequence[str], chunks: Sequence[Any]) -> list[WordOp]:
    """jiwer's alignment chunks spelt out word by word, as jiwer chose them."""
    ops: list[WordOp] = []
    for c in chunks:
        r0, r1, h0, h1 = c.ref_start_idx, c.ref_end_idx, c.hyp_start_idx, c.hyp_end_idx
        if c.type in ("equal", "substitute"):
            kind: OpKind = c.type
            ops.extend(WordOp(kind, ref[r0 + k], hyp[h0 + k]) for k in range(r1 - r0))
        elif c.type == "delete":
            ops.extend(WordOp("delete", ref[k], None) for k in range(r0, r1))
        else:
            ops.extend(WordOp("insert", None, hyp[k]) for k in range(h0, h1))
    return ops


# --- tie-break: substitute the words that look alike ------------------------------------
#
# jiwer returns one minimum-edit alignment; where a substitution and an insertion (or a
# deletion) cost the same it may pair the wrong words ("croissant -> aunt" with "cross"
# inserted). The post-pass below only re-pairs words inside a run of errors between two
# hits, so every count jiwer gave stays as it was:
#
# * In a minimum-edit alignment, a run of consecutive non-hit steps covering r reference
#   and y hypothesis words holds exactly min(r, y) substitutions and either only
#   deletions or only insertions: were there fewer, pairing one more deleted word with one
#   more inserted word would cost one edit less.
# * Any order-preserving choice of which min(r, y) words of the longer side are
#   substituted therefore keeps that run's substitutions, deletions and insertions, and
#   leaves the hits (outside the run) untouched; so the alignment keeps its cost and every
#   count. (Pairing two equal words would be a hit and a cheaper alignment, so it never
#   happens; it is refused all the same.)
# * Among those choices we take the one with the largest sum of character similarities of
#   the substituted pairs (rapidfuzz's normalised Indel similarity, 1 - indel distance /
#   total characters), and keep jiwer's own pairing unless another is strictly more alike.
# Runs where both sides have the same length, or one side is empty, have one pairing only
# and are passed through; those with a choice are rare, so the pass costs little.

_SIMILARITY_EPS = 1e-9


def _prefer_similar(ops: list[WordOp]) -> list[WordOp]:
    out: list[WordOp] = []
    start = 0
    n = len(ops)
    while start < n:
        if ops[start].kind == "equal":
            out.append(ops[start])
            start += 1
            continue
        end = start
        while end < n and ops[end].kind != "equal":
            end += 1
        out.extend(_repair_run(ops[start:end]))
        start = end
    return out


def _repair_run(run: list[WordOp]) -> list[WordOp]:
    refs = [op.ref for op in run if op.ref is not None]
    hyps = [op.hyp for op in run if op.hyp is not None]
    if len(refs) == len(hyps) or not refs or not hyps:
        return run
    swap = len(refs) > len(hyps)  # deletions: pair each hypothesis word with a reference word
    short, long = (hyps, refs) if swap else (refs, hyps)
    sim = [[-1.0 if a == b else float(Indel.normalized_similarity(a, b)) for b in long]
           for a in short]
    original = sum(sim[k][long_index] for k, long_index in enumerate(
        _pairing_of(run, swap)))
    chosen = _best_pairing(sim, len(short), len(long))
    if sum(sim[k][j] for k, j in enumerate(chosen)) <= original + _SIMILARITY_EPS:
        return run
    paired = dict(zip(chosen, range(len(short)), strict=True))
    rebuilt: list[WordOp] = []
    for j, word in enumerate(long):
        k = paired.get(j)
        if k is None:
            rebuilt.append(WordOp("delete", word, None) if swap else WordOp("insert", None, word))
        elif swap:
            rebuilt.append(WordOp("substitute", word, short[k]))
        else:
            rebuilt.append(WordOp("substitute", short[k], word))
    return rebuilt


def _pairing_of(run: list[WordOp], swap: bool) -> list[int]:
    """Index into the longer side of each substituted word of the shorter side."""
    out: list[int] = []
    j = 0
    for op in run:
        if op.kind == "substitute":
            out.append(j)
        if (op.ref if swap else op.hyp) is not None:
            j += 1
    return out


def _best_pairing(sim: list[list[float]], n_short: int, n_long: int) -> list[int]:
    """Increasing indices into the longer side, one per word of the shorter side, with the
    largest total similarity (dynamic programme over prefixes, O(n_short * n_long))."""
    neg = float("-inf")
    # best[k][j]: the first k short words paired within the first j long words
    best = [[0.0] * (n_long + 1)] + [[neg] * (n_long + 1) for _ in range(n_short)]
    for k in range(1, n_short + 1):
        row, prev, s = best[k], best[k - 1], sim[k - 1]
        for j in range(k, n_long + 1):
            row[j] = max(row[j - 1], prev[j - 1] + s[j - 1])
    chosen: list[int] = []
    k, j = n_short, n_long
    while k > 0:
        if best[k - 1][j - 1] + sim[k - 1][j - 1] >= best[k][j - 1]:
            chosen.append(j - 1)
            k -= 1
        j -= 1
    return chosen[::-1]


def align_many(
    refs: Sequence[Sequence[str]], hyps: Sequence[Sequence[str]]
) -> list[Alignment]:
    """Word alignments of hypotheses against references paired by position (one jiwer call)."""
    if len(refs) != len(hyps):
        raise ValueError(f"{len(refs)} references for {len(hyps)} hypotheses")
    out: list[Alignment | None] = [None] * len(refs)
    batch: list[int] = []
    for i, (ref, hyp) in enumerate(zip(refs, hyps, strict=True)):
        if not ref or not hyp:
            # jiwer refuses empty references; both trivial cases have one alignment only
            out[i] = Alignment(tuple([WordOp("delete", w, None) for w in ref]
                                     + [WordOp("insert", None, w) for w in hyp]))
        else:
            batch.append(i)
    if batch:
        result = jiwer.process_words([" ".join(refs[i]) for i in batch],
                                     [" ".join(hyps[i]) for i in batch])
        for i, chunks in zip(batch, result.alignments, strict=True):
            out[i] = _ops_from_chunks(refs[i], hyps[i], chunks)
    return [a for a in out if a is not None]


def align(ref: Sequence[str], hyp: Sequence[str]) -> Alignment:
    """The word alignment of one hypothesis against its reference."""
    return align_many([ref], [hyp])[0]


def counts_from_alignments(alignments: Sequence[Alignment]) -> UtteranceCounts:
    """Per-utterance counts taken from alignments already computed."""
    table = np.array([a.counts() for a in alignments], dtype=np.int64).reshape(-1, 4).T
    return UtteranceCounts(table[0], table[1], table[2], table[3])


@dataclass(frozen=True)
class CerResult:
    """Corpus character error rate over the normalised text (spaces between words included
    unless asked otherwise, see :func:`corpus_cer`)."""

    cer: float
    substitutions: int
    deletions: int
    insertions: int
    hits: int
    reference_chars: int

    def to_dict(self) -> dict[str, float | int]:
        return asdict(self)


def corpus_cer(refs: Sequence[Sequence[str]], hyps: Sequence[Sequence[str]], *,
               spaces: bool = True) -> CerResult:
    """Character errors of ``" ".join(words)`` on both sides, summed over the corpus.

    ``spaces=False`` is the character unit for scripts written without word spaces: the
    words are joined with nothing between them, so a space is never a character to get
    right or wrong (``jiwer.cer`` of ``"".join(words)`` on both sides).
    """
    if len(refs) != len(hyps):
        raise ValueError(f"{len(refs)} references for {len(hyps)} hypotheses")
    s = d = i = h = 0
    sep = " " if spaces else ""
    pairs = [(sep.join(r), sep.join(y)) for r, y in zip(refs, hyps, strict=True)]
    full = [(r, y) for r, y in pairs if r and y]
    for r, y in pairs:
        if not r:
            i += len(y)
        elif not y:
            d += len(r)
    if full:
        out = jiwer.process_characters([r for r, _ in full], [y for _, y in full])
        s += int(out.substitutions)
        d += int(out.deletions)
        i += int(out.insertions)
        h += int(out.hits)
    n = s + d + h
    return CerResult(
        cer=(s + d + i) / n if n else (0.0 if i == 0 else float("inf")),
        substitutions=s, deletions=d, insertions=i, hits=h, reference_chars=n,
    )
