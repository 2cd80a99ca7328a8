"""ARPA files written: line by line (the reference), or in vectorised blocks.

Numbers are formatted as ``%.10g`` would, with numpy: ten significant digits from one
exact scaling (a power of ten up to 1e13 is exact in float64), and the few values the
scaling cannot settle (within 1e-5 of a rounding tie, or in exponent notation) by
Python's own formatting; so the text is byte for byte what the line-by-line writer gave.
Each line is laid out in a fixed-width byte matrix (number, each word as a cell of its
bytes and the separator after it, number) and the padding is dropped by one boolean
mask; blocks of ROWS_PER_BLOCK lines keep the temporaries in the processor's cache.
"""

from __future__ import annotations

from pathlib import Path
from typing import Any

import numpy as np
import numpy.typing as npt

from rescore.lm.arpa_text import F64, I64, LOG10E, fmt
from rescore.lm.tables import BackoffTables
from rescore.lm.vocab import UNK_ID
from rescore.outputs import atomic_output


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
            probs = fmt(tables.logp[k - 1][idx])
            if k < order:
                bows = fmt(tables.bow[k - 1][idx])
                out.write("".join(f"{p}\t{g}\t{b}\n" for p, g, b in zip(probs, grams, bows,
                                                                         strict=True)))
            else:
                out.write("".join(f"{p}\t{g}\n" for p, g in zip(probs, grams, strict=True)))
        out.write("\n\\end\\\n")


NUMBER_WIDTH = 24
ROWS_PER_BLOCK = 1 << 15
MAX_WORD_WIDTH = 64  # longer words: the line-by-line writer
_POW10 = 10.0 ** np.arange(0, 14)


_FIVE: list[tuple[npt.NDArray[np.void], I64]] = []


def _five_digits() -> tuple[npt.NDArray[np.void], I64]:
    """The characters of 00000 .. 99999 (100000 items of 5 bytes) and each one's trailing
    zeros."""
    if not _FIVE:
        text = "".join(f"{i:05d}" for i in range(100_000)).encode("ascii")
        chars = np.frombuffer(text, dtype="V5")
        tz = np.zeros(100_000, dtype=np.int64)
        for z in range(1, 6):
            tz[np.arange(0, 100_000, 10 ** z)] = z
        _FIVE.append((chars, tz))
    return _FIVE[0]


_ROW = 16  # a number's row: "0000", its ten digits, two bytes to spare
_TEXT = 16  # the longest text of the fast path: "-0.000" and ten digits


def _lane_masks() -> tuple[npt.NDArray[np.uint64], npt.NDArray[np.uint64],
                           npt.NDArray[np.uint64]]:
    """By (point position, sign): which of the 16 bytes (two little-endian 64-bit words)
    come from the text before the point, which from the text after it, and the bytes
    of the point and the sign themselves."""
    before = np.zeros((2 * (_TEXT + 1), _TEXT), dtype=np.uint8)
    after = np.zeros_like(before)
    marks = np.zeros_like(before)
    for p in range(_TEXT + 1):
        for neg in (0, 1):
            r = 2 * p + neg
            before[r, neg:p] = 0xFF
            after[r, p + 1:] = 0xFF
            if p < _TEXT:
                marks[r, p] = ord(".")
            if neg:
                marks[r, 0] = ord("-")
    return tuple(np.ascontiguousarray(m.view("<u8").T)  # type: ignore[return-value]
                 for m in (before, after, marks))


_BEFORE, _AFTER, _MARKS = _lane_masks()


def format_numbers(ln_values: F64) -> tuple[npt.NDArray[np.uint8], I64]:
    """``%.10g`` of each value in log10, as ARPA files carry it (-99 for zero, a value that
    would print as -99 nudged below it): a (n, NUMBER_WIDTH) byte matrix and lengths.

    Each text is cut from a row of "0000" and the ten rounded digits: from the digits
    (|x| >= 1) or from the zeros the value needs after "0." (|x| < 1), with the point put
    after the digits before it and the sign in front (by masks over two 64-bit words)."""
    x = ln_values * LOG10E
    n = len(x)
    out = np.empty((n, NUMBER_WIDTH), dtype=np.uint8)
    words = out.view("<u8")  # three a row
    words[:, 2] = 0
    finite = np.isfinite(x)
    ax = np.abs(np.where(finite, x, 1.0))
    with np.errstate(divide="ignore"):
        e = np.floor(np.log10(np.where(ax > 0, ax, 1.0))).astype(np.int64)
    ok = finite & (ax >= 1e-4) & (ax < 1e10)
    np.clip(e, -4, 9, out=e)
    y = ax * _POW10[9 - e]
    low = ok & (y < 999999999.5)  # log10 overestimated the exponent
    e -= low
    ok &= e >= -4
    np.clip(e, -4, 9, out=e)
    y = ax * _POW10[9 - e]
    frac = y - np.floor(y)
    ok &= np.abs(frac - 0.5) > 1e-5
    digits_value = np.rint(y).astype(np.int64)
    high = ok & (digits_value >= 10_000_000_000)  # rounded up to the next power of ten
    digits_value[high] //= 10
    e += high
    ok &= (e <= 9) & (digits_value >= 1_000_000_000) & (digits_value < 10_000_000_000)
    neg = (x < 0).view(np.int8)
    # the ten digits as two five-digit halves, each looked up in a table of characters
    digits_value[~ok] = 1_000_000_000
    high_half = digits_value // 100_000
    low_half = digits_value - high_half * 100_000
    chars, zeros_at_end = _five_digits()
    tz = zeros_at_end[low_half]
    tz = np.where(low_half == 0, 5 + zeros_at_end[high_half], tz)
    kept = 10 - tz
    rows = np.empty((n + 2, _ROW), dtype=np.uint8)  # a row to spare on each side
    rows.view("<u4")[:, 0] = 0x30303030  # "0000"
    halves = rows[1:-1].view("V1")[:, 4:14].reshape(n, 10).view("V5")
    halves[:, 0] = chars[high_half]
    halves[:, 1] = chars[low_half]
    # the text after the sign: from "0000dddddddddd", at its digits (e >= 0) or e places
    # before them, with a point after q characters (e + 1, or the 0 before the point)
    window = np.ndarray((len(rows) * _ROW - _TEXT + 1,), dtype=f"V{_TEXT}", buffer=rows,
                        strides=(1,))
    lead = e >= 0
    start = np.arange(_ROW + 4, (n + 1) * _ROW, _ROW, dtype=np.int64)
    start += np.minimum(e, 0)
    start -= neg
    q = np.maximum(e, 0) + 1
    code = q + neg
    code *= 2
    code += neg  # (point position, sign)
    before = window[start].view("<u8").reshape(n, 2)
    after = window[start - 1].view("<u8").reshape(n, 2)
    for j in range(2):
        lane = _BEFORE[j].take(code)
        lane &= before[:, j]
        mask = _AFTER[j].take(code)
        mask &= after[:, j]
        lane |= mask
        lane |= _MARKS[j].take(code)
        words[:, j] = lane
    length = neg + np.where(lead, q + (kept > q) + np.maximum(kept - q, 0), 1 - e + kept)
    zero = finite & (ax == 0)
    out[zero, 0] = np.where(np.signbit(x[zero]), ord("-"), ord("0"))
    out[zero, 1] = ord("0")
    length[zero] = 1 + np.signbit(x[zero])
    ok |= zero
    minus_99 = ok & (digits_value == 9_900_000_000) & (e == 1) & (neg == 1)
    special = ~ok | minus_99
    for i in np.flatnonzero(special).tolist():
        spelled = fmt(ln_values[i:i + 1])[0].encode("ascii")
        out[i, :] = 0
        out[i, :len(spelled)] = np.frombuffer(spelled, dtype=np.uint8)
        length[i] = len(spelled)
    return out, length


class _Cells:
    """Each word as a fixed-width cell: its bytes, then the separator that follows it
    (space, tab or newline), then padding; and which bytes of the cell are kept."""

    def __init__(self, encoded: list[bytes]) -> None:
        self.width = max(len(w) for w in encoded) + 1
        w = self.width
        self.chars = {sep: np.frombuffer(b"".join((x + sep).ljust(w, b"\0") for x in encoded),
                                         dtype=f"V{w}")
                      for sep in (b" ", b"\t", b"\n")}
        lengths = np.array([len(x) + 1 for x in encoded], dtype=np.int64)
        self.keep = np.ascontiguousarray(np.arange(w)[None, :] < lengths[:, None]).view(
            f"V{w}")[:, 0]

    @staticmethod
    def of(words: tuple[str, ...]) -> _Cells | None:
        encoded = [x.encode("utf-8") for x in words]
        if max(len(x) for x in encoded) > MAX_WORD_WIDTH:
            return None
        return _Cells(encoded)


_KEEP: dict[int, npt.NDArray[np.void]] = {}


def _keep_first(width: int) -> npt.NDArray[np.void]:
    """By length (0 to NUMBER_WIDTH): a cell of ``width`` flags, the first ``length`` set."""
    if width not in _KEEP:
        flags = np.arange(width)[None, :] < np.arange(NUMBER_WIDTH + 1)[:, None]
        _KEEP[width] = np.ascontiguousarray(flags).view(f"V{width}")[:, 0]
    return _KEEP[width]


def _lines(ids: npt.NDArray[Any], probs: F64, bows: F64 | None, cells: _Cells) -> bytes:
    """The ARPA lines of one block of n-grams: prob TAB w1 SPACE .. wk [TAB bow] NEWLINE,
    laid out in one fixed-width matrix whose padding a boolean mask then drops."""
    n, k = ids.shape
    width = cells.width
    numbers = [format_numbers(probs)] + ([format_numbers(bows)] if bows is not None else [])
    num_width = max(int(ln.max(initial=1)) for _, ln in numbers)
    total = num_width + 1 + k * width + (num_width + 1 if bows is not None else 0)
    line = np.empty((n, total), dtype=np.uint8)
    keep = np.empty((n, total), dtype=bool)
    keep_number = _keep_first(num_width)
    at = 0

    def number(chars: npt.NDArray[np.uint8], length: I64, sep: int) -> None:
        nonlocal at
        line[:, at:at + num_width] = chars[:, :num_width]
        keep[:, at:at + num_width].view(f"V{num_width}")[:, 0] = keep_number[length]
        at += num_width
        line[:, at] = sep
        keep[:, at] = True
        at += 1

    number(*numbers[0], 9)
    for j in range(k):
        sep = b" " if j < k - 1 else (b"\t" if bows is not None else b"\n")
        word = ids[:, j]
        line[:, at:at + width].view(f"V{width}")[:, 0] = cells.chars[sep][word]
        keep[:, at:at + width].view(f"V{width}")[:, 0] = cells.keep[word]
        at += width
    if bows is not None:
        number(*numbers[1], 10)
    return bytes(line[keep].data)


def write_fast(tables: BackoffTables, path: str | Path, *, closed_vocab: bool = False) -> bool:
    """Write as :func:`write_lines` would, in vectorised blocks; False (nothing written) when
    a word is too long for the fixed-width layout."""
    cells = _Cells.of(tables.vocab.words)
    if cells is None:
        return False
    order = tables.order
    unigram_rows = np.array([i for i in range(tables.vsize)
                             if not (closed_vocab and i == UNK_ID)], dtype=np.int64)
    counts = [len(unigram_rows)] + [len(tables.logp[k - 1]) for k in range(2, order + 1)]
    below: npt.NDArray[np.int32] | None = None  # the word matrix of the order below
    with atomic_output(path, "wb") as fh:
        fh.write(("\n\\data\\\n" + "".join(f"ngram {k}={n}\n" for k, n in
                                            enumerate(counts, start=1))).encode("ascii"))
        for k in range(1, order + 1):
            fh.write(f"\n\\{k}-grams:\n".encode("ascii"))
            if k == 1:
                words: npt.NDArray[Any] = unigram_rows[:, None]
            else:  # as tables.words_of(k), from the order below's: one derivation an order
                suffix, first = tables.suffix_first(k)
                words = np.empty((len(first), k), dtype=np.int32)
                words[:, 0] = first
                del first
                tails = (np.arange(tables.vsize, dtype=np.int32)[:, None]
                         if below is None else below)
                cell = f"V{4 * (k - 1)}"  # a row of the order below, gathered whole
                words[:, 1:].view(cell)[:, 0] = tails.view(cell)[:, 0][suffix]
                del tails
                del suffix
                below = words if k < order else None
            for at in range(0, counts[k - 1], ROWS_PER_BLOCK):
                part = slice(at, at + ROWS_PER_BLOCK)
                idx: Any = unigram_rows[part] if k == 1 else part
                probs = tables.logp[k - 1][idx]
                bows = tables.bow[k - 1][idx] if k < order else None
                fh.write(_lines(words[part], probs, bows, cells))
            del words
        fh.write(b"\n\\end\\\n")
    return True
