"""The fast ARPA reader: whole blocks of lines parsed with numpy.

Whole blocks of lines are parsed with numpy: the positions of newlines, tabs and spaces
give every field; the numbers of a block are read by one ``np.fromstring`` call after
the words are blanked out; each word (up to 16 bytes) becomes two little-endian integers
looked up in a hash table of the vocabulary, and the n-grams of each order go straight
into the compact tables of the native file. Anything this path does not expect (other
whitespace, "inf", an unknown word, a missing suffix, a duplicate, a count that does not
match, a damaged gzip stream...) hands the file to the exact reader, which reads any
valid file and names the line of any error.
"""

from __future__ import annotations

import math
import warnings
import zlib
from typing import Any

import numpy as np
import numpy.typing as npt

from rescore.lm import hashindex
from rescore.lm.arpa_text import F64, I64, MAX_LINE_BYTES, NGRAM_LINE, SECTION, ln10
from rescore.lm.model import MAX_ORDER
from rescore.lm.tables import BackoffTables
from rescore.lm.vocab import BOS_ID, SPECIALS, UNK_ID, Vocabulary
from rescore.process import give_back_freed_memory

BLOCK_BYTES = 1 << 20
WORD_BYTES = 16  # words up to this length are matched as two integers, longer ones by a dict
_LOW = np.array([(1 << (8 * i)) - 1 for i in range(8)] + [(1 << 64) - 1], dtype=np.uint64)
_KEEP = np.array([255, 0, 255], dtype=np.uint8)  # the number, the words, the rest of a line
_MIX1 = np.uint64(0x9E3779B97F4A7C15)
_MIX2 = np.uint64(0xC2B2AE3D27D4EB4F)


class Slow(Exception):
    """The fast reader met something it leaves to the exact reader."""



def _blocks(fh: Any) -> Any:
    """Blocks of whole lines (each ending in a newline), about BLOCK_BYTES each."""
    carry = b""
    while True:
        try:
            chunk = fh.read(BLOCK_BYTES)
        except (OSError, EOFError, zlib.error):
            raise Slow from None
        if not chunk:
            if carry:
                yield carry + b"\n"
            return
        data = carry + chunk if carry else chunk
        cut = data.rfind(b"\n") + 1
        if cut == 0:
            if len(data) > MAX_LINE_BYTES + 2:
                raise Slow
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
            raise Slow from None
        if decoded == "\\end\\":
            self.finish_section()
            if len(self.declared) != len(self.logp) or not self.declared:
                raise Slow
            self.state = "end"
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

    # -- a run of n-gram lines ------------------------------------------------------------

    def grams(self, arr: npt.NDArray[np.uint8], padded: npt.NDArray[np.uint64],
              block: bytes, starts: I64, ends: I64) -> None:
        order = self.current
        if self.state != "grams" or order is None:
            raise Slow
        n, k = len(starts), order.k
        if order.filled + n > order.count or int((ends - starts).max()) > MAX_LINE_BYTES:
            raise Slow
        lo, hi = int(starts[0]), int(ends[-1])
        seg = arr[lo:hi + 1]
        if not seg.all():
            raise Slow  # a 0 byte: never in a word nor a number
        tabs = np.flatnonzero(seg == 9)
        tabs += lo
        first_tab = np.searchsorted(tabs, starts)
        n_tabs = np.searchsorted(tabs, ends) - first_tab
        if order.top:
            if np.any(n_tabs != 1):
                raise Slow
            has_bow = None
        else:
            if np.any((n_tabs != 1) & (n_tabs != 2)):
                raise Slow
            has_bow = n_tabs == 2
        if not len(tabs) or int(first_tab[-1]) >= len(tabs):
            raise Slow
        t1 = tabs[first_tab]
        w_start = t1 + 1
        if has_bow is None:
            w_end = ends
        else:
            w_end = np.where(has_bow, tabs[np.minimum(first_tab + 1, len(tabs) - 1)], ends)
        if np.any(w_end <= w_start) or np.any(t1 <= starts):
            raise Slow
        spaces = np.flatnonzero(seg == 32)
        spaces += lo
        if len(spaces) != n * (k - 1):
            raise Slow
        # the numbers: the words blanked out (a mask repeated field by field: number and
        # tab, words, the rest of the line), then one parse of the whole run
        if has_bow is not None and np.any(has_bow & (ends <= w_end + 1)):
            raise Slow  # an empty back-off field
        spans = np.empty((n, 3), dtype=np.int64)
        spans[:, 0] = w_start - starts
        spans[:, 1] = w_end - w_start
        spans[:, 2] = ends + 1 - w_end
        keep = np.repeat(np.tile(_KEEP, n), spans.reshape(-1))
        numbers = np.bitwise_and(seg, keep)
        np.invert(keep, out=keep)
        keep &= np.uint8(32)
        numbers |= keep
        del keep
        # digits, signs, points, exponents and the three separators only: no letter past
        # "e" (inf and nan are refused below), no other white space or control byte
        if int(numbers.max()) > 0x65 or np.any(np.less(numbers - np.uint8(11), 3)):
            raise Slow
        want = n if has_bow is None else n + int(np.count_nonzero(has_bow))
        with warnings.catch_warnings():
            warnings.simplefilter("error")
            try:
                values = np.fromstring(numbers.tobytes(), dtype=np.float64, sep=" ")
            except (ValueError, DeprecationWarning):
                raise Slow from None
        if len(values) != want or not np.all(np.isfinite(values)):
            raise Slow
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
                raise Slow
        if not np.all(prob <= 0):
            raise Slow
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
                    raise Slow
                tok_start = np.concatenate([w_start[:, None], gaps + 1], axis=1)
                tok_end = np.concatenate([gaps, w_end[:, None]], axis=1)
            else:
                if np.any(spaces <= w_start) or np.any(spaces >= w_end - 1):
                    raise Slow
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
                raise Slow  # a suffix the file does not list: the exact reader adds it
        key = suffix.astype(np.uint64)
        key *= v
        key += words[:, 0].astype(np.uint64)
        return key

    # -- words to ids -----------------------------------------------------------------------

    def set_vocabulary(self, unigrams: list[bytes]) -> I64:
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
        short = np.array([len(w) <= WORD_BYTES for w in encoded])
        joined = b"".join(w.ljust(WORD_BYTES, b"\0")[:WORD_BYTES] for w in encoded)
        pairs = np.frombuffer(joined, dtype="<u8").reshape(-1, 2)
        self.x0 = np.ascontiguousarray(pairs[:, 0])
        self.x1 = np.ascontiguousarray(pairs[:, 1])
        mixed = self._mix(self.x0, self.x1)
        mixed[~short] = hashindex.NO_KEY - np.uint64(1) - np.arange(  # never matched
            int(np.count_nonzero(~short)), dtype=np.uint64)
        if len(np.unique(mixed)) != len(mixed) or np.any(mixed == hashindex.NO_KEY):
            raise Slow
        # the table holds each slot's word as its two integers: a probe compares both
        slots = hashindex.build_slots(mixed)
        self.bits = len(slots).bit_length() - 1
        # empty slots and long words' slots hold 0, which no query holds: every token
        # starts with a byte that is not 0 (a block with a 0 byte is the exact reader's)
        short_slot = slots >= 0
        short_slot[short_slot] = short[slots[short_slot]]
        self.held0 = np.where(short_slot, self.x0[slots], np.uint64(0))
        self.held1 = np.where(short_slot, self.x1[slots], np.uint64(0))
        self.ids = slots
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

    def _find(self, x0: npt.NDArray[np.uint64], x1: npt.NDArray[np.uint64]) -> I64:
        """The id of each word given as its two integers, or -1: linear probing from the
        slot that :func:`hashindex.build_slots` gave the word's mixed value."""
        mask = len(self.ids) - 1
        where = hashindex.home(self._mix(x0, x1), self.bits)
        found = self.ids[where].astype(np.int64)
        miss = (self.held0[where] != x0) | (self.held1[where] != x1)
        if not miss.any():
            return found
        pending = np.flatnonzero(miss)
        found[pending] = -1
        where = where[pending]
        pending = pending[self.ids[where] >= 0]  # an empty slot: not a word of the file
        where = where[self.ids[where] >= 0]
        while pending.size:
            where = (where + 1) & mask
            at = self.ids[where]
            hit = (self.held0[where] == x0[pending]) & (self.held1[where] == x1[pending])
            found[pending[hit]] = at[hit]
            more = ~hit & (at >= 0)
            pending, where = pending[more], where[more]
        return found

    def word_ids(self, padded: npt.NDArray[np.uint64], block: bytes, start: I64,
                 end: I64) -> npt.NDArray[np.int32]:
        length = end - start
        x0 = padded[start]
        x0 &= _LOW[np.minimum(length, 8)]
        x1 = padded[start + 8]
        x1 &= _LOW[np.clip(length - 8, 0, 8)]
        found = self._find(x0, x1)
        ok = found >= 0
        long = length > WORD_BYTES
        if long.any():
            at = np.flatnonzero(long)
            got = [self.long_words.get(block[a:b], -1)
                   for a, b in zip(start[at].tolist(), end[at].tolist(), strict=True)]
            found[at] = got
            ok[at] = found[at] >= 0
        if not ok.all():
            raise Slow
        return found.astype(np.int32)

    # -- each order, once read: straight into the compact tables ---------------------------

    def finish_section(self) -> None:
        order = self.current
        if order is None:
            return
        if order.filled != order.count:
            raise Slow
        if order.k == 1:
            rows = self.set_vocabulary(order.unigrams)
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
        if self.state != "end" or self.vocab is None:
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
