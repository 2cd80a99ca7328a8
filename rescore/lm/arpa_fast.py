"""The fast ARPA reader: whole blocks of lines parsed with numpy.

The file is read a block at a time into one buffer. One scan of a block finds its
separators (newlines, tabs, spaces, and points, the only bytes at or below the space or
equal to "." that a clean file holds), which give every field of every line; the numbers
are read with integer arithmetic over the bytes (:mod:`rescore.lm.arpa_numbers`); each word
(up to 16 bytes) becomes two little-endian integers looked up in a hash table of the
vocabulary whose most probable words sit in their first slot, and the n-grams of each
order go straight into the compact tables of the native file. Anything this path does
not expect (other white space or control bytes, "inf", an unknown word, a missing suffix,
a duplicate, a count that does not match, a damaged gzip stream...) hands the file to the
exact reader, which reads any valid file and names the line of any error.
"""

from __future__ import annotations

import math
import zlib
from collections.abc import Iterator
from typing import Any

import numpy as np
import numpy.typing as npt

from rescore.lm import hashindex
from rescore.lm.arpa_numbers import MARGIN, chunks, parse_fields, parse_texts
from rescore.lm.arpa_text import F64, I64, MAX_LINE_BYTES, NGRAM_LINE, SECTION, ln10
from rescore.lm.arpa_words import WordIds
from rescore.lm.model import MAX_ORDER
from rescore.lm.tables import BackoffTables
from rescore.lm.vocab import BOS_ID, SPECIALS, UNK_ID, Vocabulary
from rescore.process import give_back_freed_memory

BLOCK_BYTES = 1 << 20
U64 = npt.NDArray[np.uint64]


class Slow(Exception):
    """The fast reader met something it leaves to the exact reader."""


class _Buffer:
    """One buffer for every block: MARGIN bytes before a block and 16 after it are always
    there to be read (their content is undefined), so that 8-byte words can be read at any
    byte of the block."""

    def __init__(self) -> None:
        size = MARGIN + BLOCK_BYTES + MAX_LINE_BYTES + 2 + 1 + 16
        self.raw = bytearray(size)
        self.bytes = np.frombuffer(self.raw, dtype=np.uint8)
        # the little-endian 64-bit word at every byte offset
        self.words: U64 = np.ndarray((size - 7,), dtype="<u8", buffer=self.raw, strides=(1,))
        self.chunks = chunks(self.raw)

    def release(self) -> None:
        """Give the buffer's memory back (no block is read after)."""
        del self.bytes, self.words, self.chunks
        self.raw = bytearray()

    def blocks(self, fh: Any) -> Iterator[tuple[int, int]]:
        """Bounds in the buffer of blocks of whole lines (each ending in a newline), about
        BLOCK_BYTES each; a block is overwritten by the next."""
        raw, view = self.raw, memoryview(self.raw)
        have = MARGIN
        while True:
            try:
                got = fh.readinto(view[have:have + BLOCK_BYTES])
            except (OSError, EOFError, zlib.error):
                raise Slow from None
            if not got:
                if have > MARGIN:
                    raw[have] = 10
                    yield MARGIN, have + 1
                return
            have += got
            cut = raw.rfind(b"\n", MARGIN, have) + 1
            if cut == 0:
                if have - MARGIN > MAX_LINE_BYTES + 2:
                    raise Slow
                continue
            yield MARGIN, cut
            rest = have - cut
            raw[MARGIN:MARGIN + rest] = raw[cut:have]
            have = MARGIN + rest


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
    def __init__(self, buf: _Buffer) -> None:
        self.buf = buf
        self.declared: list[int] = []
        self.state = "start"
        self.current: _Order | None = None
        self.vocab: Vocabulary | None = None
        self.words: WordIds | None = None
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
            raise Slow from None
        if decoded == "\\end\\":
            self.state = "end"  # the last order is finished once the buffer is given up
            return
        section = SECTION.match(decoded)
        if section:
            k = int(section.group(1))
            done = self.current.k if self.current else 0
            if not self.declared or k != done + 1 or k > len(self.declared):
                raise Slow
            self.finish_section()
            self.current = _Order(k, self.declared[k - 1], k == len(self.declared))
            self.state = "grams"
            return
        m = NGRAM_LINE.match(decoded)
        if self.state == "data" and m:
            k, n = int(m.group(1)), int(m.group(2))
            if k != len(self.declared) + 1 or k > MAX_ORDER:
                raise Slow
            self.declared.append(n)
            return
        raise Slow

    # -- a block: its lines, runs of n-gram lines between the others ------------------------

    def block(self, lo: int, hi: int) -> None:
        buf, raw = self.buf.bytes, self.buf.raw
        arr = buf[lo:hi]
        found = arr <= 32
        found |= arr == 46
        at = np.flatnonzero(found)  # the separators (and any other byte below "!")
        del found
        at += lo
        what = buf[at]
        nl = np.flatnonzero(what == 10)
        ends = at[nl]
        starts = np.empty_like(ends)
        starts[0] = lo
        starts[1:] = ends[:-1] + 1
        i = 0
        if self.state != "grams":  # the header: line by line until a section mark is taken
            while i < len(ends) and self.state not in ("grams", "end"):
                self.line(bytes(raw[starts[i]:ends[i]]))
                i += 1
            if self.state != "grams":
                return
        # lines that are not n-grams: blank or starting with a backslash; everything
        # between two of them is one run of n-grams
        other = ends[i:] == starts[i:]
        other |= buf[starts[i:]] == 0x5C
        run = i
        for m in [*(np.flatnonzero(other) + i).tolist(), len(ends)]:
            if m > run:
                first = int(nl[run - 1]) + 1 if run else 0
                last = int(nl[m - 1]) + 1
                self.grams(at[first:last], what[first:last], nl[run:m] - first,
                           starts[run:m], ends[run:m])
            if m < len(ends):
                self.line(bytes(raw[starts[m]:ends[m]]))
                if self.state == "end":
                    return
            run = m + 1

    def grams(self, at: I64, what: npt.NDArray[np.uint8], nl: I64, starts: I64,
              ends: I64) -> None:
        """A run of n-gram lines, given its separators (``at``: positions, ``what``: bytes),
        the index among them of each line's newline, and the lines' bounds."""
        order = self.current
        if self.state != "grams" or order is None:
            raise Slow
        n, k = len(starts), order.k
        if order.filled + n > order.count or int((ends - starts).max()) > MAX_LINE_BYTES:
            raise Slow
        is_tab = what == 9
        is_space = what == 32
        is_point = what == 46
        n_tabs = int(np.count_nonzero(is_tab))
        n_points = int(np.count_nonzero(is_point))
        spaces = np.flatnonzero(is_space)
        if n_tabs + len(spaces) + n_points + n != len(what) or len(spaces) != n * (k - 1):
            raise Slow  # a byte below the space other than tab and newline
        # each line: [point] TAB words [TAB [point]] NEWLINE, points in words aside
        line_first = np.empty(n, dtype=np.int64)
        line_first[0] = 0
        line_first[1:] = nl[:-1] + 1
        prob_point = is_point[line_first]
        tab1 = line_first + prob_point
        if not is_tab[tab1].all():
            raise Slow
        last = nl - 1
        bow_point = is_point[last]
        tab2 = last - bow_point
        has_bow = is_tab[tab2] & (tab2 > tab1)
        n_bows = int(np.count_nonzero(has_bow))
        if n_tabs != n + n_bows or (order.top and n_bows):
            raise Slow
        t1 = at[tab1]
        w_start = t1 + 1
        w_end = np.where(has_bow, at[tab2], ends) if n_bows else ends
        if np.any(w_end <= w_start) or np.any(t1 <= starts):
            raise Slow
        if n_bows and np.any(has_bow & (ends <= w_end + 1)):
            raise Slow  # an empty back-off field
        # the numbers
        at_fill = order.filled
        prob_point = np.where(prob_point, at[line_first], t1)
        bow_point = np.where(bow_point, at[last], ends) if n_bows else ends
        self.fill_numbers(order, at_fill, starts, prob_point, t1, has_bow, n_bows, w_end,
                          bow_point, ends)
        # the words: every one at least a byte long (then each line's spaces, k - 1 in
        # all of them, lie in its own word field)
        if k == 1:
            raw = self.buf.raw
            order.unigrams.extend(bytes(raw[a:b]) for a, b in zip(w_start.tolist(),
                                                                  w_end.tolist(), strict=True))
        else:
            gaps = at[spaces].reshape(n, k - 1)
            tok_start = np.empty((n, k), dtype=np.int64)
            tok_start[:, 0] = w_start
            np.add(gaps, 1, out=tok_start[:, 1:])
            tok_end = np.empty((n, k), dtype=np.int64)
            tok_end[:, :-1] = gaps
            tok_end[:, -1] = w_end
            del gaps
            assert order.keys is not None
            words = self.word_ids(tok_start.reshape(-1), tok_end.reshape(-1)).reshape(n, k)
            order.keys[at_fill:at_fill + n] = self.key_of(words)
        order.filled += n

    def fill_numbers(self, order: _Order, at: int, starts: I64, prob_point: I64, t1: I64,
                     has_bow: npt.NDArray[np.bool_], n_bows: int, w_end: I64,
                     bow_point: I64, ends: I64) -> None:
        n = len(starts)
        prob = self.numbers(starts, prob_point, t1)
        if not np.all(prob <= 0):
            raise Slow
        order.prob[at:at + n] = prob
        if n_bows:
            assert order.bow is not None
            if n_bows == n:
                order.bow[at:at + n] = self.numbers(w_end + 1, bow_point, ends)
            else:
                got = order.bow[at:at + n]
                got[has_bow] = self.numbers(w_end[has_bow] + 1, bow_point[has_bow],
                                            ends[has_bow])

    def numbers(self, start: I64, point: I64, end: I64) -> F64:
        values, done = parse_fields(self.buf.chunks, self.buf.bytes, start, point, end)
        if not done.all():
            odd = np.flatnonzero(~done)
            raw = self.buf.raw
            try:
                values[odd] = parse_texts([bytes(raw[a:b]) for a, b in
                                           zip(start[odd].tolist(), end[odd].tolist(),
                                               strict=True)])
            except ValueError:
                raise Slow from None
        return values

    def key_of(self, words: npt.NDArray[np.int32]) -> npt.NDArray[np.uint64]:
        """Each row's key: its suffix found order by order in the tables made so far, once
        for each run of rows with the same suffix (as in a file sorted by suffix)."""
        assert self.vocab is not None
        n, k = words.shape
        v = np.uint64(len(self.vocab))
        # new[i]: row i's suffix of j words (the last j) differs from row i-1's
        new = np.empty(n, dtype=bool)
        new[0] = True
        np.not_equal(words[1:, k - 1], words[:-1, k - 1], out=new[1:])
        heads = np.flatnonzero(new)
        suffix = words[heads, k - 1].astype(np.uint64)
        for j in range(2, k):
            index = self.index[j - 1]
            assert index is not None
            run = np.cumsum(new, dtype=np.int64)  # 1 + the run of j - 1 words of each row
            new[1:] |= words[1:, k - j] != words[:-1, k - j]
            heads = np.flatnonzero(new)
            key = suffix[run[heads] - 1]
            del run
            key *= v
            key += words[heads, k - j].astype(np.uint64)
            found = index.find(key)
            if np.any(found < 0):
                raise Slow  # a suffix the file does not list: the exact reader adds it
            suffix = found.view(np.uint64)
        if len(heads) < n:
            suffix = np.repeat(suffix, np.diff(heads, append=n))
        out: npt.NDArray[np.uint64] = suffix * v
        out += words[:, 0].astype(np.uint64)
        return out

    # -- words to ids -----------------------------------------------------------------------

    def set_vocabulary(self, unigrams: list[bytes], log10: F64) -> I64:
        try:
            words = [w.decode("utf-8") for w in unigrams]
        except UnicodeDecodeError:
            raise Slow from None
        vocab = Vocabulary.from_words(w for w in words if w not in SPECIALS)
        rows = np.array([vocab.index[w] for w in words], dtype=np.int64)
        if len(np.unique(rows)) != len(rows):
            raise Slow
        encoded = [w.encode("utf-8") for w in vocab.words]
        if any(b"\0" in w for w in encoded):
            raise Slow
        # most probable first (<s> leads: it is the first word of many n-grams, though
        # never predicted): they take their home slot before the others
        rank = np.full(len(vocab), -math.inf)
        rank[rows] = log10
        rank[BOS_ID] = math.inf
        self.words = WordIds(encoded, np.argsort(-rank, kind="stable"))
        self.vocab = vocab
        return rows

    def word_ids(self, start: I64, end: I64) -> npt.NDArray[np.int32]:
        assert self.words is not None
        found = self.words.find(self.buf.words, self.buf.raw, start, end)
        if np.any(found < 0):
            raise Slow
        return found

    # -- each order, once read: straight into the compact tables ---------------------------

    def finish_section(self) -> None:
        order = self.current
        if order is None:
            return
        if order.filled != order.count:
            raise Slow
        if order.k == 1:
            rows = self.set_vocabulary(order.unigrams, order.prob)
            assert self.vocab is not None
            v = len(self.vocab)
            logp1 = np.full(v, -math.inf)
            logp1[rows] = ln10(order.prob)
            logp1[BOS_ID] = -math.inf  # <s> is never predicted, whatever the file says
            self.logp.append(logp1)
            if not order.top:
                assert order.bow is not None
                bow1 = np.zeros(v)
                bow1[rows] = ln10(order.bow)
                self.bow.append(bow1)
            unigram_ids = set(rows.tolist())
            self.meta = {"method": "arpa", "closed_vocab": UNK_ID not in unigram_ids,
                         "bos_listed": BOS_ID in unigram_ids}
        else:
            give_back_freed_memory()  # the blocks' temporaries: the peak comes next
            self.add_order(order)
            give_back_freed_memory()  # the read arrays given up, before the next order
        self.current = None

    def add_order(self, order: _Order) -> None:
        assert self.vocab is not None and order.keys is not None
        space = len(self.logp[order.k - 2]) * len(self.vocab)
        keys = order.take_keys()
        index, perm = hashindex.BucketIndex.build(keys, space, overwrite=True)
        if index.duplicates:
            raise Slow  # an n-gram listed twice: the exact reader names both lines
        self.index.append(index)
        # the arrays given up are reused: the keys' memory takes the probabilities, the
        # read probabilities' memory the back-off weights
        logp = _permuted(order.prob, perm, keys.view(np.float64))
        self.logp.append(ln10(logp))
        if order.bow is not None:
            bow = _permuted(order.bow, perm, order.prob)
            self.bow.append(ln10(bow))
            order.bow = None
        order.prob = np.zeros(0)

    def tables(self) -> BackoffTables:
        if self.state != "end":
            raise Slow
        self.words = None  # not needed any more: the last order's peak comes next
        self.finish_section()
        if len(self.declared) != len(self.logp) or not self.declared or self.vocab is None:
            raise Slow
        return BackoffTables(self.vocab, self.logp, self.bow, [], [], self.index)



def _permuted(values: F64, perm: npt.NDArray[Any], out: F64) -> F64:
    """``values[perm]`` into ``out``, a slice at a time (numpy widens 32-bit positions to
    a temporary copy: a slice's, not the whole permutation's)."""
    step = 1 << 18
    for at in range(0, len(perm), step):
        np.take(values, perm[at:at + step], out=out[at:at + step])
    return out


def read_fast(fh: Any) -> tuple[BackoffTables, dict[str, Any]]:
    reader = _FastReader(_Buffer())
    for lo, hi in reader.buf.blocks(fh):
        reader.block(lo, hi)
        if reader.state == "end":
            break
    reader.buf.release()
    return reader.tables(), reader.meta
