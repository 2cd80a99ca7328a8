"""ARPA back-off text files (log10), read and written.

Conventions written: a ``\\data\\`` block of ``ngram k=count`` lines, then one section per
order of ``log10prob<TAB>w1 .. wk[<TAB>log10bow]``, the highest order without back-off
column, and ``\\end\\``. ``<s>`` is listed with probability -99 (it is never predicted).
Exactly -99 stands for a zero probability or weight both ways; any other number is read as
the log10 value it is (so -120 is the tiny probability 1e-120, not zero), and a finite
value that would print as -99 is written one step below it. Probabilities must be <= 0
(``-inf`` is read as zero); back-off weights may be any finite number, positive ones
included (entropy pruning can leave a context more weight than one). A model without
``<unk>`` among its unigrams is a closed-vocabulary model. Reading accepts any valid file:
an n-gram whose suffix is not listed gets that suffix added with the probability the
back-off rule gives it, so look-ups behave exactly as the file says.
"""

from __future__ import annotations

import math
import re
import shutil
import sys
import tempfile
import warnings
import zlib
from pathlib import Path
from typing import Any

import numpy as np
import numpy.typing as npt

from rescore.compression import open_binary
from rescore.errors import ModelFileError, RescoreError
from rescore.lm import hashindex
from rescore.lm.model import MAX_ORDER
from rescore.lm.tables import BackoffTables
from rescore.lm.vocab import BOS, BOS_ID, SPECIALS, UNK_ID, Vocabulary
from rescore.outputs import atomic_output
from rescore.process import give_back_freed_memory
from rescore.readers import iter_text_lines

F64 = npt.NDArray[np.float64]
I64 = npt.NDArray[np.int64]
LOG10E = 1.0 / math.log(10.0)
ZERO = -99.0  # log10 of "never"
NUDGED_ZERO = "-99.0000001"  # a real probability that would otherwise print as -99
MAX_LINE_BYTES = 1 << 20  # an n-gram line is a few words and numbers; refuse runaway lines
# bounded digit runs: int() of thousands of digits raises ValueError, not our error
_NGRAM_LINE = re.compile(r"^ngram\s+([0-9]{1,6})\s*=\s*([0-9]{1,15})$")
_SECTION = re.compile(r"^\\([0-9]{1,6})-grams:$")

Entry = tuple[list[str], float, float, int]  # words, log10 prob, log10 bow, line number


def _fmt(values: F64) -> list[str]:
    log10 = values * LOG10E
    out = []
    for x in log10.tolist():
        if not math.isfinite(x):
            out.append(f"{ZERO:g}")
            continue
        text = f"{x:.10g}"
        out.append(NUDGED_ZERO if float(text) == ZERO else text)
    return out


def write(tables: BackoffTables, path: str | Path, *, closed_vocab: bool = False) -> None:
    """Write ``tables`` as an ARPA file (gzip for a ``.gz`` name), atomically.

    A closed-vocabulary model leaves ``<unk>`` out, which is how a reader recognises it.
    The text is formatted in vectorised blocks (:func:`write_fast`), or line by line
    (:func:`write_lines`, the same bytes) when a word is too long for that.
    """
    if not write_fast(tables, path, closed_vocab=closed_vocab):
        write_lines(tables, path, closed_vocab=closed_vocab)


def write_lines(tables: BackoffTables, path: str | Path, *, closed_vocab: bool = False) -> None:
    """The line-by-line writer (also the baseline of the benchmark)."""
    order = tables.order
    words = tables.vocab.words
    unigram_rows = [i for i in range(len(words)) if not (closed_vocab and i == UNK_ID)]
    counts = [len(unigram_rows)] + [len(tables.logp[k - 1]) for k in range(2, order + 1)]
    with atomic_output(path, "w") as fh:
        out: Any = fh
        out.write("\n\\data\\\n")
        for k, n in enumerate(counts, start=1):
            out.write(f"ngram {k}={n}\n")
        for k in range(1, order + 1):
            out.write(f"\n\\{k}-grams:\n")
            if k == 1:
                idx = np.array(unigram_rows, dtype=np.int64)
                grams = [words[i] for i in unigram_rows]
            else:
                idx = np.arange(counts[k - 1], dtype=np.int64)
                mat = tables.words_of(k)
                grams = [" ".join(words[j] for j in row) for row in mat.tolist()]
            probs = _fmt(tables.logp[k - 1][idx])
            if k < order:
                bows = _fmt(tables.bow[k - 1][idx])
                out.write("".join(f"{p}\t{g}\t{b}\n" for p, g, b in zip(probs, grams, bows,
                                                                         strict=True)))
            else:
                out.write("".join(f"{p}\t{g}\n" for p, g in zip(probs, grams, strict=True)))
        out.write("\n\\end\\\n")


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
        section = _SECTION.match(line)
        if state == "data" and (m := _NGRAM_LINE.match(line)):
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


# --- the fast reader ------------------------------------------------------------------------
#
# Whole blocks of lines are parsed with numpy: the positions of newlines, tabs and spaces
# give every field; the numbers of a block are read by one ``np.fromstring`` call after
# the words are blanked out; each word (up to 16 bytes) becomes two little-endian integers
# looked up in a hash table of the vocabulary, and the n-grams of each order go straight
# into the compact tables of the native file. Anything this path does not expect (other
# whitespace, "inf", an unknown word, a missing suffix, a duplicate, a count that does not
# match, a damaged gzip stream...) hands the file to the exact reader, which reads any
# valid file and names the line of any error.

BLOCK_BYTES = 2 << 20
WORD_BYTES = 16  # words up to this length are matched as two integers, longer ones by a dict
_LOW = np.array([(1 << (8 * i)) - 1 for i in range(8)] + [(1 << 64) - 1], dtype=np.uint64)
_NUMBER_BYTES = np.zeros(256, dtype=bool)
_NUMBER_BYTES[list(b"0123456789.+-eE \t\n")] = True
_MIX1 = np.uint64(0x9E3779B97F4A7C15)
_MIX2 = np.uint64(0xC2B2AE3D27D4EB4F)


class _Slow(Exception):
    """The fast reader met something it leaves to the exact reader."""


def read(path: str | Path) -> tuple[BackoffTables, dict[str, Any]]:
    """Read an ARPA file (``-``: standard input) into compact back-off tables, fast.

    Files as this program writes them, and most written elsewhere, are parsed in blocks
    with numpy; any other file, and every malformed one, is read by :func:`read_exact`
    (slower, and naming the line of an error). Standard input is first copied to a
    temporary file, so that the exact reader can read it again when needed.
    """
    if str(path) == "-":
        return _read_stdin()
    try:
        with open_binary(path) as fh:
            return _read_fast(fh)
    except _Slow:
        pass
    tables, meta = read_exact(path)
    return tables.compact(), meta


def _read_stdin() -> tuple[BackoffTables, dict[str, Any]]:
    with tempfile.NamedTemporaryFile(prefix="rescore-stdin-", suffix=".arpa") as tmp:
        shutil.copyfileobj(sys.stdin.buffer, tmp, 1 << 20)
        tmp.flush()
        try:
            return read(tmp.name)
        except RescoreError as exc:
            if exc.path == tmp.name:
                exc.path = "-"
            raise


def _blocks(fh: Any) -> Any:
    """Blocks of whole lines (each ending in a newline), about BLOCK_BYTES each."""
    carry = b""
    while True:
        try:
            chunk = fh.read(BLOCK_BYTES)
        except (OSError, EOFError, zlib.error):
            raise _Slow from None
        if not chunk:
            if carry:
                yield carry + b"\n"
            return
        data = carry + chunk if carry else chunk
        cut = data.rfind(b"\n") + 1
        if cut == 0:
            if len(data) > MAX_LINE_BYTES + 2:
                raise _Slow
            carry = data
            continue
        carry = data[cut:]
        yield data[:cut]


class _Order:
    """The n-grams of one order as they are read: word ids, log10 probabilities, weights."""

    def __init__(self, k: int, count: int, top: bool) -> None:
        self.k, self.count, self.top, self.filled = k, count, top, 0
        # the key of each n-gram (its suffix's id x vocabulary size + its first word)
        self.keys = np.empty(count, dtype=np.uint64) if k > 1 else None
        self.prob = np.empty(count, dtype=np.float64)
        self.bow = None if top else np.zeros(count, dtype=np.float64)
        self.unigrams: list[bytes] = []

    def take_keys(self) -> npt.NDArray[np.uint64]:
        keys, self.keys = self.keys, None
        assert keys is not None
        return keys


class _FastReader:
    def __init__(self) -> None:
        self.declared: list[int] = []
        self.state = "start"
        self.current: _Order | None = None
        self.vocab: Vocabulary | None = None
        self.logp: list[F64] = []
        self.bow: list[F64] = []
        self.index: list[hashindex.BucketIndex | None] = [None]
        self.meta: dict[str, Any] = {}

    # -- lines that are not n-grams: the header, section marks, blank lines --------------

    def line(self, text: bytes) -> None:
        line = text.strip()
        if self.state == "start":
            if line == b"\\data\\":
                self.state = "data"
            return
        if not line:
            return
        try:
            decoded = line.decode("ascii")
        except UnicodeDecodeError:
            raise _Slow from None
        if decoded == "\\end\\":
            self.finish_section()
            if len(self.declared) != len(self.logp) or not self.declared:
                raise _Slow
            self.state = "end"
            return
        section = _SECTION.match(decoded)
        if section:
            k = int(section.group(1))
            done = self.current.k if self.current else 0
            if not self.declared or k != done + 1 or k > len(self.declared):
                raise _Slow
            self.finish_section()
            self.current = _Order(k, self.declared[k - 1], k == len(self.declared))
            self.state = "grams"
            return
        m = _NGRAM_LINE.match(decoded)
        if self.state == "data" and m:
            k, n = int(m.group(1)), int(m.group(2))
            if k != len(self.declared) + 1 or k > MAX_ORDER:
                raise _Slow
            self.declared.append(n)
            return
        raise _Slow

    # -- a run of n-gram lines ------------------------------------------------------------

    def grams(self, arr: npt.NDArray[np.uint8], padded: npt.NDArray[np.uint64],
              block: bytes, starts: I64, ends: I64) -> None:
        order = self.current
        if self.state != "grams" or order is None:
            raise _Slow
        n, k = len(starts), order.k
        if order.filled + n > order.count or int((ends - starts).max()) > MAX_LINE_BYTES:
            raise _Slow
        lo, hi = int(starts[0]), int(ends[-1])
        seg = arr[lo:hi + 1]
        tabs = np.flatnonzero(seg == 9)
        tabs += lo
        first_tab = np.searchsorted(tabs, starts)
        n_tabs = np.searchsorted(tabs, ends) - first_tab
        if order.top:
            if np.any(n_tabs != 1):
                raise _Slow
            has_bow = None
        else:
            if np.any((n_tabs != 1) & (n_tabs != 2)):
                raise _Slow
            has_bow = n_tabs == 2
        if not len(tabs) or int(first_tab[-1]) >= len(tabs):
            raise _Slow
        t1 = tabs[first_tab]
        w_start = t1 + 1
        if has_bow is None:
            w_end = ends
        else:
            w_end = np.where(has_bow, tabs[np.minimum(first_tab + 1, len(tabs) - 1)], ends)
        if np.any(w_end <= w_start) or np.any(t1 <= starts):
            raise _Slow
        spaces = np.flatnonzero(seg == 32)
        spaces += lo
        if len(spaces) != n * (k - 1):
            raise _Slow
        # the numbers: the words blanked out, then one parse of the whole run
        mark = np.zeros(len(seg) + 1, dtype=np.int8)
        mark[w_start - lo] = 1
        mark[w_end - lo] = -1
        in_words = np.cumsum(mark[:-1], dtype=np.int8).view(bool)
        numbers = np.where(in_words, np.uint8(32), seg)
        if not _NUMBER_BYTES[numbers].all():
            raise _Slow
        want = n if has_bow is None else n + int(np.count_nonzero(has_bow))
        with warnings.catch_warnings():
            warnings.simplefilter("error")
            try:
                values = np.fromstring(numbers.tobytes(), dtype=np.float64, sep=" ")
            except (ValueError, DeprecationWarning):
                raise _Slow from None
        if len(values) != want:
            raise _Slow
        at = order.filled
        if has_bow is None:
            prob = values
        else:
            pos = np.zeros(n, dtype=np.int64)
            np.cumsum(1 + has_bow[:-1], out=pos[1:])
            prob = values[pos]
            assert order.bow is not None
            got = order.bow[at:at + n]
            got[has_bow] = values[pos[has_bow] + 1]
            if not np.all(np.isfinite(got)):
                raise _Slow
        if not np.all(prob <= 0):
            raise _Slow
        order.prob[at:at + n] = prob
        # the words
        if k == 1:
            order.unigrams.extend(block[a:b] for a, b in zip(w_start.tolist(), w_end.tolist(),
                                                               strict=True))
        else:
            if k > 2:
                gaps = spaces.reshape(n, k - 1)
                inside = (gaps > w_start[:, None]) & (gaps < w_end[:, None] - 1)
                if not inside.all() or np.any(np.diff(gaps, axis=1) < 2):
                    raise _Slow
                tok_start = np.concatenate([w_start[:, None], gaps + 1], axis=1)
                tok_end = np.concatenate([gaps, w_end[:, None]], axis=1)
            else:
                if np.any(spaces <= w_start) or np.any(spaces >= w_end - 1):
                    raise _Slow
                tok_start = np.stack([w_start, spaces + 1], axis=1)
                tok_end = np.stack([spaces, w_end], axis=1)
            assert order.keys is not None
            words = self.word_ids(padded, block, tok_start.reshape(-1),
                                  tok_end.reshape(-1)).reshape(n, k)
            order.keys[at:at + n] = self.key_of(words)
        order.filled += n

    def key_of(self, words: npt.NDArray[np.int32]) -> npt.NDArray[np.uint64]:
        """Each row's key: its suffix found order by order in the tables made so far."""
        assert self.vocab is not None
        k = words.shape[1]
        v = np.uint64(len(self.vocab))
        suffix = words[:, k - 1].astype(np.int64)
        for j in range(2, k):
            index = self.index[j - 1]
            assert index is not None
            key = suffix.astype(np.uint64)
            key *= v
            key += words[:, k - j].astype(np.uint64)
            suffix = index.find(key)
            if np.any(suffix < 0):
                raise _Slow  # a suffix the file does not list: the exact reader adds it
        key = suffix.astype(np.uint64)
        key *= v
        key += words[:, 0].astype(np.uint64)
        return key

    # -- words to ids -----------------------------------------------------------------------

    def set_vocabulary(self, unigrams: list[bytes]) -> I64:
        try:
            words = [w.decode("utf-8") for w in unigrams]
        except UnicodeDecodeError:
            raise _Slow from None
        vocab = Vocabulary.from_words(w for w in words if w not in SPECIALS)
        rows = np.array([vocab.index[w] for w in words], dtype=np.int64)
        if len(np.unique(rows)) != len(rows):
            raise _Slow
        encoded = [w.encode("utf-8") for w in vocab.words]
        if any(b"\0" in w for w in encoded):
            raise _Slow
        short = np.array([len(w) <= WORD_BYTES for w in encoded])
        joined = b"".join(w.ljust(WORD_BYTES, b"\0")[:WORD_BYTES] for w in encoded)
        pairs = np.frombuffer(joined, dtype="<u8").reshape(-1, 2)
        self.x0 = np.ascontiguousarray(pairs[:, 0])
        self.x1 = np.ascontiguousarray(pairs[:, 1])
        mixed = self._mix(self.x0, self.x1)
        mixed[~short] = hashindex.NO_KEY - np.uint64(1) - np.arange(  # never matched
            int(np.count_nonzero(~short)), dtype=np.uint64)
        if len(np.unique(mixed)) != len(mixed) or np.any(mixed == hashindex.NO_KEY):
            raise _Slow
        self.slots = hashindex.build_slots(mixed)
        self.held = hashindex.slot_keys(self.slots, mixed)
        self.short = short
        self.long_words = {w: i for i, w in enumerate(encoded) if len(w) > WORD_BYTES}
        self.vocab = vocab
        return rows

    @staticmethod
    def _mix(x0: npt.NDArray[np.uint64], x1: npt.NDArray[np.uint64]) -> npt.NDArray[np.uint64]:
        with np.errstate(over="ignore"):
            z = x0 * _MIX1
            z += x1 * _MIX2
        z ^= z >> np.uint64(31)
        return z

    def word_ids(self, padded: npt.NDArray[np.uint64], block: bytes, start: I64,
                 end: I64) -> npt.NDArray[np.int32]:
        length = end - start
        x0 = padded[start]
        x0 &= _LOW[np.minimum(length, 8)]
        x1 = padded[start + 8]
        x1 &= _LOW[np.clip(length - 8, 0, 8)]
        found = hashindex.lookup_slotted(self.slots, self.held, self._mix(x0, x1))
        ok = found >= 0
        ok[ok] = (self.x0[found[ok]] == x0[ok]) & (self.x1[found[ok]] == x1[ok])
        long = length > WORD_BYTES
        if long.any():
            at = np.flatnonzero(long)
            got = [self.long_words.get(block[a:b], -1)
                   for a, b in zip(start[at].tolist(), end[at].tolist(), strict=True)]
            found[at] = got
            ok[at] = found[at] >= 0
        if not ok.all():
            raise _Slow
        return found.astype(np.int32)

    # -- each order, once read: straight into the compact tables ---------------------------

    def finish_section(self) -> None:
        order = self.current
        if order is None:
            return
        if order.filled != order.count:
            raise _Slow
        if order.k == 1:
            rows = self.set_vocabulary(order.unigrams)
            assert self.vocab is not None
            v = len(self.vocab)
            logp1 = np.full(v, -math.inf)
            logp1[rows] = _ln10(order.prob)
            logp1[BOS_ID] = -math.inf  # <s> is never predicted, whatever the file says
            self.logp.append(logp1)
            if not order.top:
                assert order.bow is not None
                bow1 = np.zeros(v)
                bow1[rows] = _ln10(order.bow)
                self.bow.append(bow1)
            unigram_ids = set(rows.tolist())
            self.meta = {"method": "arpa", "closed_vocab": UNK_ID not in unigram_ids,
                         "bos_listed": BOS_ID in unigram_ids}
        else:
            give_back_freed_memory()  # the blocks' temporaries: the peak comes next
            self.add_order(order)
        self.current = None

    def add_order(self, order: _Order) -> None:
        assert self.vocab is not None and order.keys is not None
        space = len(self.logp[order.k - 2]) * len(self.vocab)
        keys = order.take_keys()
        index, perm = hashindex.BucketIndex.build(keys, space, overwrite=True)
        if index.duplicates:
            raise _Slow  # an n-gram listed twice: the exact reader names both lines
        self.index.append(index)
        # the arrays given up are reused: the keys' memory takes the probabilities, the
        # read probabilities' memory the back-off weights
        logp = np.take(order.prob, perm, out=keys.view(np.float64))
        self.logp.append(_ln10(logp))
        if order.bow is not None:
            bow = np.take(order.bow, perm, out=order.prob)
            self.bow.append(_ln10(bow))
            order.bow = None
        order.prob = np.zeros(0)

    def tables(self) -> BackoffTables:
        if self.state != "end" or self.vocab is None:
            raise _Slow
        return BackoffTables(self.vocab, self.logp, self.bow, [], [], self.index)


def _ln10(values: F64) -> F64:
    """Natural logs of log10 values, in place; exactly -99 is the conventional zero."""
    zero = values == ZERO
    values /= LOG10E
    values[zero] = -math.inf
    return values


def _read_fast(fh: Any) -> tuple[BackoffTables, dict[str, Any]]:
    reader = _FastReader()
    for block in _blocks(fh):
        if reader.state == "end":
            break
        arr = np.frombuffer(block, dtype=np.uint8)
        ends = np.flatnonzero(arr == 10)
        starts = np.empty_like(ends)
        starts[0] = 0
        starts[1:] = ends[:-1] + 1
        # lines that are not n-grams: blank, starting with a backslash, or anything while
        # the header is read; everything between two of them is one run of n-grams
        other = (ends == starts) | (arr[starts] == 0x5C)
        if reader.state != "grams":
            # the header: line by line until the first section mark is taken
            i = 0
            while i < len(ends) and reader.state != "grams":
                reader.line(block[starts[i]:ends[i]])
                i += 1
                if reader.state == "end":
                    break
            if reader.state != "grams":
                continue
            other[:i] = True
            skip_upto = i
        else:
            skip_upto = 0
        padded = _padded(arr)
        marks = np.flatnonzero(other)
        run_start = skip_upto
        for m in [*marks[marks >= skip_upto].tolist(), len(ends)]:
            if m > run_start:
                reader.grams(arr, padded, block, starts[run_start:m], ends[run_start:m])
            if m < len(ends):
                reader.line(block[starts[m]:ends[m]])
                if reader.state == "end":
                    break
            run_start = m + 1
    return reader.tables(), reader.meta


def _padded(arr: npt.NDArray[np.uint8]) -> npt.NDArray[np.uint64]:
    """A little-endian uint64 at every byte offset of ``arr`` (zeros past its end)."""
    buf = np.zeros(len(arr) + 16, dtype=np.uint8)
    buf[:len(arr)] = arr
    return np.ndarray((len(arr) + 8,), dtype="<u8", buffer=buf, strides=(1,))


# --- the fast writer ------------------------------------------------------------------------
#
# Numbers are formatted as ``%.10g`` would, with numpy: ten significant digits from one
# exact scaling (a power of ten up to 1e13 is exact in float64), and the few values the
# scaling cannot settle (within 1e-5 of a rounding tie, or in exponent notation) by
# Python's own formatting; so the text is byte for byte what the line-by-line writer gave.
# Each line is laid out in a fixed-width byte matrix (number, words from a padded
# vocabulary matrix, number) and the padding is dropped by one boolean mask.

NUMBER_WIDTH = 24
ROWS_PER_BLOCK = 1 << 18
MAX_WORD_WIDTH = 64  # longer words: the line-by-line writer
_POW10 = 10.0 ** np.arange(0, 14)


_FIVE: list[tuple[npt.NDArray[np.uint8], I64]] = []


def _five_digits() -> tuple[npt.NDArray[np.uint8], I64]:
    """The characters of 00000 .. 99999 (100000 x 5) and each one's trailing zeros."""
    if not _FIVE:
        text = "".join(f"{i:05d}" for i in range(100_000)).encode("ascii")
        chars = np.frombuffer(text, dtype=np.uint8).reshape(100_000, 5)
        tz = np.zeros(100_000, dtype=np.int64)
        for z in range(1, 6):
            tz[np.arange(0, 100_000, 10 ** z)] = z
        _FIVE.append((chars, tz))
    return _FIVE[0]


def _layout(e: int, neg: bool) -> list[int]:
    """Source columns (digits 0-9, then '.', '0', '-') of ``%.10g`` with exponent ``e``."""
    sign = [12] if neg else []
    if e >= 0:
        return sign + list(range(e + 1)) + [10] + list(range(e + 1, 10))
    return sign + [11, 10] + [11] * (-e - 1) + list(range(10))


_LAYOUTS = [_layout(e, bool(neg)) for e in range(-4, 10) for neg in (0, 1)]


def format_numbers(ln_values: F64) -> tuple[npt.NDArray[np.uint8], I64]:
    """``%.10g`` of each value in log10, as ARPA files carry it (-99 for zero, a value that
    would print as -99 nudged below it): a (n, NUMBER_WIDTH) byte matrix and lengths."""
    x = ln_values * LOG10E
    n = len(x)
    out = np.zeros((n, NUMBER_WIDTH), dtype=np.uint8)
    length = np.zeros(n, dtype=np.int64)
    finite = np.isfinite(x)
    ax = np.abs(np.where(finite, x, 1.0))
    with np.errstate(divide="ignore"):
        e = np.floor(np.log10(np.where(ax > 0, ax, 1.0))).astype(np.int64)
    ok = finite & (ax >= 1e-4) & (ax < 1e10)
    e = np.clip(e, -4, 9)
    y = ax * _POW10[9 - e]
    low = ok & (y < 999999999.5)  # log10 overestimated the exponent
    e[low] -= 1
    ok &= e >= -4
    e = np.clip(e, -4, 9)
    y = ax * _POW10[9 - e]
    frac = y - np.floor(y)
    ok &= np.abs(frac - 0.5) > 1e-5
    digits_value = np.rint(y).astype(np.int64)
    high = ok & (digits_value >= 10_000_000_000)  # rounded up to the next power of ten
    digits_value[high] //= 10
    e[high] += 1
    ok &= (e <= 9) & (digits_value >= 1_000_000_000) & (digits_value < 10_000_000_000)
    neg = x < 0
    # the ten digits as two five-digit halves, each looked up in a table of characters
    whole = np.where(ok, digits_value, 1_000_000_000).astype(np.float64)  # exact
    upper = np.floor(whole / 1e5)  # exact: a quotient by 1e5 never rounds across an integer
    low_half = (whole - upper * 1e5).astype(np.int64)
    high_half = upper.astype(np.int64)
    chars, zeros_at_end = _five_digits()
    tz = zeros_at_end[low_half]
    tz = np.where(low_half == 0, 5 + zeros_at_end[high_half], tz)
    kept = 10 - tz
    # characters to pick from: the ten digits, then '.', '0', '-'; one fixed layout per
    # (exponent, sign) pair, cut to length by the trailing zeros dropped
    ext = np.empty((n, 13), dtype=np.uint8)
    ext[:, :5] = chars[high_half]
    ext[:, 5:10] = chars[low_half]
    ext[:, 10], ext[:, 11], ext[:, 12] = ord("."), ord("0"), ord("-")
    code = np.where(ok, (e + 4) * 2 + neg, len(_LAYOUTS)).astype(np.int8)
    perm = np.argsort(code, kind="stable")  # a radix sort of small integers
    bounds = np.searchsorted(code[perm], np.arange(len(_LAYOUTS) + 1))
    ext = ext[perm]
    grouped = np.zeros((n, 16), dtype=np.uint8)
    for c in range(len(_LAYOUTS)):
        a, b = int(bounds[c]), int(bounds[c + 1])
        if b > a:
            src = _LAYOUTS[c]
            grouped[a:b, :len(src)] = ext[a:b, src]
    out[perm, :16] = grouped
    lead = e >= 0
    int_len = np.where(lead, e + 1, 0)
    frac_len = np.where(lead, np.maximum(kept - int_len, 0), kept)
    length[:] = neg + np.where(lead, int_len + (frac_len > 0) + frac_len, 1 - e + kept)
    zero = finite & (ax == 0)
    out[zero, 0] = np.where(np.signbit(x[zero]), ord("-"), ord("0"))
    out[zero, 1] = ord("0")
    length[zero] = 1 + np.signbit(x[zero])
    ok |= zero
    minus_99 = ok & (digits_value == 9_900_000_000) & (e == 1) & (neg == 1)
    special = ~ok | minus_99
    for i in np.flatnonzero(special).tolist():
        text = _fmt(ln_values[i:i + 1])[0].encode("ascii")
        out[i, :] = 0
        out[i, :len(text)] = np.frombuffer(text, dtype=np.uint8)
        length[i] = len(text)
    return out, length


def _vocab_matrix(words: tuple[str, ...]) -> tuple[npt.NDArray[np.uint8], I64] | None:
    encoded = [w.encode("utf-8") for w in words]
    width = max(1, max(len(w) for w in encoded))
    if width > MAX_WORD_WIDTH:
        return None
    mat = np.frombuffer(b"".join(w.ljust(width, b"\0") for w in encoded),
                        dtype=np.uint8).reshape(len(words), width)
    return mat, np.array([len(w) for w in encoded], dtype=np.int64)


def _lines(ids: I64, probs: F64, bows: F64 | None, mat: npt.NDArray[np.uint8],
           lens: I64) -> bytes:
    """The ARPA lines of one block of n-grams: prob TAB w1 SPACE .. wk [TAB bow] NEWLINE,
    laid out in one fixed-width matrix whose padding a boolean mask then drops."""
    n, k = ids.shape
    width = mat.shape[1]
    numbers = [format_numbers(probs)] + ([format_numbers(bows)] if bows is not None else [])
    num_width = max(int(ln.max(initial=1)) for _, ln in numbers)
    total = num_width + 1 + k * (width + 1) + (num_width + 1 if bows is not None else 0)
    line = np.empty((n, total), dtype=np.uint8)
    keep = np.empty((n, total), dtype=bool)
    at = 0

    def put(chars: npt.NDArray[np.uint8], length: I64) -> None:
        nonlocal at
        w = chars.shape[1]
        line[:, at:at + w] = chars
        np.less(np.arange(w)[None, :], length[:, None], out=keep[:, at:at + w])
        at += w

    def sep(byte: int) -> None:
        nonlocal at
        line[:, at] = byte
        keep[:, at] = True
        at += 1

    put(numbers[0][0][:, :num_width], numbers[0][1])
    sep(9)
    for j in range(k):
        put(mat[ids[:, j]], lens[ids[:, j]])
        sep(32 if j < k - 1 else (9 if bows is not None else 10))
    if bows is not None:
        put(numbers[1][0][:, :num_width], numbers[1][1])
        sep(10)
    return bytes(line[keep].data)


def write_fast(tables: BackoffTables, path: str | Path, *, closed_vocab: bool = False) -> bool:
    """Write as :func:`write_lines` would, in vectorised blocks; False (nothing written) when
    a word is too long for the fixed-width layout."""
    got = _vocab_matrix(tables.vocab.words)
    if got is None:
        return False
    mat, lens = got
    order = tables.order
    unigram_rows = np.array([i for i in range(tables.vsize)
                             if not (closed_vocab and i == UNK_ID)], dtype=np.int64)
    counts = [len(unigram_rows)] + [len(tables.logp[k - 1]) for k in range(2, order + 1)]
    with atomic_output(path, "wb") as fh:
        fh.write(("\n\\data\\\n" + "".join(f"ngram {k}={n}\n" for k, n in
                                            enumerate(counts, start=1))).encode("ascii"))
        for k in range(1, order + 1):
            fh.write(f"\n\\{k}-grams:\n".encode("ascii"))
            words = unigram_rows[:, None] if k == 1 else tables.words_of(k)
            rows = unigram_rows if k == 1 else None
            for at in range(0, counts[k - 1], ROWS_PER_BLOCK):
                part = slice(at, at + ROWS_PER_BLOCK)
                idx = rows[part] if rows is not None else np.arange(
                    at, min(at + ROWS_PER_BLOCK, counts[k - 1]))
                probs = tables.logp[k - 1][idx]
                bows = tables.bow[k - 1][idx] if k < order else None
                fh.write(_lines(words[part], probs, bows, mat, lens))
            del words
        fh.write(b"\n\\end\\\n")
    return True
