"""The exact ARPA reader: line by line, any valid file, the line of any error named.

It adds each listed n-gram's missing suffix with the probability the back-off rule gives
it, so look-ups behave exactly as the file says; the fast reader hands it every file it
does not expect.
"""

from __future__ import annotations

import math
from pathlib import Path
from typing import Any

import numpy as np

from rescore.errors import ModelFileError
from rescore.lm import hashindex
from rescore.lm.arpa_text import F64, I64, LOG10E, MAX_LINE_BYTES, NGRAM_LINE, SECTION, ZERO
from rescore.lm.model import MAX_ORDER
from rescore.lm.tables import BackoffTables
from rescore.lm.vocab import BOS, BOS_ID, SPECIALS, UNK_ID, Vocabulary
from rescore.readers import iter_text_lines

Entry = tuple[list[str], float, float, int]  # words, log10 prob, log10 bow, line number


def _show(text: str, limit: int = 60) -> str:
    """``text`` quoted for a one-line message, cut short when long."""
    return repr(text) if len(text) <= limit else repr(text[:limit]) + f"... ({len(text)} chars)"


def _error(path: str | Path, line: int | None, field: str | None, what: str) -> ModelFileError:
    return ModelFileError(what, path=str(path), line=line, field=field)


def _number(text: str, path: str | Path, line: int, field: str, *, bow: bool) -> float:
    """A log10 value: a probability is <= 0 (``-inf`` allowed), a back-off weight finite."""
    try:
        value = float(text)
    except ValueError:
        raise _error(path, line, field, f"not a number: {_show(text)}") from None
    if bow and not math.isfinite(value):
        raise _error(path, line, field,
                     f"a log10 weight must be a finite number, got {_show(text)}")
    if not bow and (math.isnan(value) or value > 0):
        raise _error(path, line, field,
                     f"a log10 probability must be a number <= 0, got {_show(text)}")
    return value


def _parse(path: str | Path) -> tuple[list[int], list[list[Entry]]]:
    """Declared counts and, per order, the entries (words, log10 prob, log10 bow, line)."""
    declared: list[int] = []
    sections: list[list[Entry]] = []
    state = "start"
    current = 0
    last_line = 0
    for number, raw in iter_text_lines(path, MAX_LINE_BYTES):
        last_line = number
        line = raw.strip()
        if state == "start":
            if line == "\\data\\":
                state = "data"
            continue
        if not line:
            continue
        if line == "\\end\\":
            state = "end"
            break
        section = SECTION.match(line)
        if state == "data" and (m := NGRAM_LINE.match(line)):
            k, n = int(m.group(1)), int(m.group(2))
            if k != len(declared) + 1 or k > MAX_ORDER:
                raise _error(path, number, "counts header",
                             f"expected 'ngram {len(declared) + 1}=COUNT', got {_show(line)}")
            declared.append(n)
            continue
        if section:
            k = int(section.group(1))
            if not declared:
                raise _error(path, number, "counts header", "no 'ngram k=count' lines")
            if k != current + 1 or k > len(declared):
                raise _error(path, number, "section",
                             f"expected \\{current + 1}-grams:, got {_show(line)}")
            if current and len(sections[-1]) != declared[current - 1]:
                raise _error(path, number, "counts header",
                             f"{len(sections[-1])} {current}-grams listed, "
                             f"header says {declared[current - 1]}")
            current = k
            sections.append([])
            state = "grams"
            continue
        if state != "grams":
            raise _error(path, number, "counts header", f"unexpected line {_show(line)}")
        fields = line.split()
        top = current == len(declared)
        if len(fields) not in ((current + 1,) if top else (current + 1, current + 2)):
            want = f"{current + 1}" if top else f"{current + 1} or {current + 2}"
            raise _error(path, number, f"{current}-gram",
                         f"expected {want} fields, got {len(fields)}")
        prob = _number(fields[0], path, number, "probability", bow=False)
        bow = _number(fields[current + 1], path, number, "back-off weight", bow=True) \
            if len(fields) == current + 2 else 0.0
        sections[-1].append((fields[1:current + 1], prob, bow, number))
    if state == "start":
        raise _error(path, None, None, "not an ARPA file: no \\data\\ line")
    if state != "end":
        raise _error(path, last_line, None, "missing \\end\\ (the file is truncated?)")
    if not declared:
        raise _error(path, last_line, "counts header",
                     "no 'ngram k=count' lines and no n-gram sections before \\end\\")
    if len(sections) != len(declared):
        raise _error(path, last_line, "section", f"{len(declared)} orders declared, "
                                                 f"{len(sections)} sections found")
    if sections and len(sections[-1]) != declared[-1]:
        raise _error(path, last_line, "counts header",
                     f"{len(sections[-1])} {current}-grams listed, header says {declared[-1]}")
    return declared, sections


def _ln(values: list[float]) -> F64:
    """Natural logs of log10 values; exactly -99 is the conventional zero."""
    arr = np.array(values, dtype=np.float64)
    return np.where(arr == ZERO, -math.inf, arr / LOG10E)


class _Duplicate(Exception):
    """Raised by ``_build``: rows ``first`` and ``again`` of order ``k`` are one n-gram."""

    def __init__(self, k: int, first: int, again: int) -> None:
        super().__init__(k, first, again)
        self.k, self.first, self.again = k, first, again


def _unknown_word(path: str | Path, k: int, rows: list[Entry], index: dict[str, int]
                  ) -> ModelFileError:
    for words, _, _, line in rows:
        for w in words:
            if w not in index:
                return _error(path, line, f"{k}-gram", f"word {w!r} is not a unigram")
    raise AssertionError("no unknown word")  # pragma: no cover - called after a KeyError


def read_exact(path: str | Path) -> tuple[BackoffTables, dict[str, Any]]:
    """Read any valid ARPA file line by line (the exact reader: it names the line of any
    error, and adds missing suffixes); see :func:`read` for the fast one."""
    _, sections = _parse(path)
    unigram_words = [g[0][0] for g in sections[0]]
    vocab = Vocabulary.from_words(w for w in unigram_words if w not in SPECIALS)
    v = len(vocab)
    index = vocab.index
    rows1 = np.array([index[g[0][0]] for g in sections[0]], dtype=np.int64)
    first_line: dict[int, int] = {}
    for i, (words, _, _, line) in zip(rows1.tolist(), sections[0], strict=True):
        if i in first_line:
            raise _error(path, line, "1-gram",
                         f"{words[0]!r} is listed twice (first on line {first_line[i]})")
        first_line[i] = line
    logp1 = np.full(v, -math.inf)
    bow1 = np.zeros(v)
    logp1[rows1] = _ln([g[1] for g in sections[0]])
    bow1[rows1] = _ln([g[2] for g in sections[0]])
    logp1[BOS_ID] = -math.inf  # <s> is never predicted, whatever the file says
    mats: list[I64] = [np.arange(v, dtype=np.int64)[:, None]]
    probs: list[F64] = [logp1]
    bows: list[F64] = [bow1]
    for k in range(2, len(sections) + 1):
        rows = sections[k - 1]
        try:
            mat = np.array([[index[w] for w in g[0]] for g in rows], dtype=np.int64)
        except KeyError:
            raise _unknown_word(path, k, rows, index) from None
        mats.append(mat.reshape(len(rows), k))
        probs.append(_ln([g[1] for g in rows]))
        bows.append(_ln([g[2] for g in rows]))
    _close_suffixes(mats, probs, bows)
    try:
        tables = _build(vocab, mats, probs, bows)
    except _Duplicate as dup:
        rows = sections[dup.k - 1]
        gram = " ".join(rows[dup.again][0])
        raise _error(path, rows[dup.again][3], f"{dup.k}-gram",
                     f"{gram!r} is listed twice (first on line {rows[dup.first][3]})") from None
    closed = UNK_ID not in first_line
    meta: dict[str, Any] = {"method": "arpa", "closed_vocab": bool(closed),
                            "bos_listed": BOS in unigram_words}
    return tables, meta


def _close_suffixes(mats: list[I64], probs: list[F64], bows: list[F64]) -> None:
    """Add each listed n-gram's missing suffix, probability NaN until ``_build`` fills it."""
    for k in range(len(mats), 2, -1):
        lower, suffixes = mats[k - 2], mats[k - 1][:, 1:]
        if not len(suffixes):
            continue
        both = np.concatenate([lower, suffixes])
        uniq, inv = np.unique(both, axis=0, return_inverse=True)
        inv = inv.reshape(-1)
        missing = np.setdiff1d(inv[len(lower):], inv[:len(lower)])
        if missing.size:
            mats[k - 2] = np.concatenate([lower, uniq[missing]])
            probs[k - 2] = np.concatenate([probs[k - 2], np.full(missing.size, np.nan)])
            bows[k - 2] = np.concatenate([bows[k - 2], np.zeros(missing.size)])


def _build(vocab: Vocabulary, mats: list[I64], probs: list[F64], bows: list[F64]) -> BackoffTables:
    order = len(mats)
    logp: list[F64] = [probs[0]]
    bow: list[F64] = [bows[0]] if order > 1 else []
    keys = [np.zeros(0, dtype=np.uint64)]
    slots = [np.zeros(0, dtype=np.int32)]
    for k in range(2, order + 1):
        partial = BackoffTables(vocab, logp, bow[: k - 2], keys, slots)
        mat = mats[k - 1]
        suffix = partial.ids_of(mat[:, 1:])
        key = partial.key(suffix, mat[:, 0])
        perm = np.argsort(key, kind="stable")
        key, mat = key[perm], mat[perm]
        if len(key) > 1 and np.any(same := key[1:] == key[:-1]):
            # stable sort: equal keys keep file order, so perm[j] < perm[j + 1]
            j = np.flatnonzero(same)
            at = int(np.argmin(perm[j + 1]))
            start = int(j[at])
            while start > 0 and key[start - 1] == key[start]:
                start -= 1
            raise _Duplicate(k, int(perm[start]), int(perm[j[at] + 1]))
        p, b = probs[k - 1][perm], bows[k - 1][perm]
        gap = np.isnan(p)
        if gap.any():
            # the back-off rule's value: bow(context) + log P(w | shorter context)
            ctx = partial.ids_of(mat[gap, :-1])
            ctx_bow = np.where(ctx >= 0, bow[k - 2][np.maximum(ctx, 0)], 0.0)
            p[gap] = ctx_bow + partial.score_ngrams(mat[gap, 1:])
        logp.append(p)
        if k < order:
            bow.append(b)
        keys.append(key)
        slots.append(hashindex.build_slots(key))
    return BackoffTables(vocab, logp, bow, keys, slots)
