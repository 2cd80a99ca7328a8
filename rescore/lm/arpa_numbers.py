"""Decimal numbers of ARPA text read with integer arithmetic over the bytes of a block.

A number ``-?D*(.D*)?`` with one to 15 digits in all is ``M / 10**b``: ``M`` the integer
its digits spell (below 10**15 < 2**53, so an exact double) and ``b`` the digits after the
point (10**b, b <= 15, is an exact double too). An IEEE 754 division of two exact doubles
is correctly rounded, so the quotient is the double nearest the decimal, which is what
Python's ``float()`` gives for the text (the classic fast path of decimal-to-binary
conversion); the sign is applied after, as rounding to nearest is symmetric. The digits
are read eight at a time from little-endian 64-bit words, three multiplications a word.
Every other text (an exponent, more digits, a plus sign, anything odd) is marked and left
to :func:`parse_texts`, numpy's own parse, as before.
"""

from __future__ import annotations

import warnings
from typing import Any

import numpy as np
import numpy.typing as npt

from rescore.lm.arpa_text import F64, I64

U64 = npt.NDArray[np.uint64]
MARGIN = 24  # readable bytes before a block: a number's last 24 bytes are read at once
MAX_DIGITS = 15  # 10**15 < 2**53: the integer of the digits is an exact double

# _HIGH[i]: the top i bytes of a 64-bit word (the last i characters of 8 read from memory)
_HIGH = np.array([0] + [(((1 << (8 * i)) - 1) << (64 - 8 * i)) for i in range(1, 9)],
                 dtype=np.uint64)
_ZEROS = np.uint64(0x3030303030303030)  # "00000000"
_SIX = np.uint64(0x0606060606060606)
_HIGH_NIBBLES = np.uint64(0xF0F0F0F0F0F0F0F0)
_POW10 = 10.0 ** np.arange(MAX_DIGITS + 1)  # exact doubles
_E8 = np.uint64(100_000_000)


def _eight(v: U64) -> U64:
    """In place: the value of the eight digits (0 to 9, one a byte, the lowest-addressed
    byte the most significant) of each 64-bit word."""
    with np.errstate(over="ignore"):
        v *= np.uint64(10 * 256 + 1)  # pairs of digits
        v >>= np.uint64(8)
        v &= np.uint64(0x00FF00FF00FF00FF)
        v *= np.uint64(100 * 65536 + 1)  # fours
        v >>= np.uint64(16)
        v &= np.uint64(0x0000FFFF0000FFFF)
        v *= np.uint64(10000 * (1 << 32) + 1)  # eights
        v >>= np.uint64(32)
    return v


def chunks(raw: Any) -> npt.NDArray[np.void]:
    """The 24 bytes at every byte offset of ``raw`` (read as three 64-bit words)."""
    return np.ndarray((len(raw) - 23,), dtype="V24", buffer=raw, strides=(1,))


def parse_fields(chunk: npt.NDArray[np.void], buf: npt.NDArray[np.uint8], start: I64,
                 point: I64, end: I64) -> tuple[F64, npt.NDArray[np.bool_]]:
    """Each number ``buf[start:end]``, its point at ``point`` (``end`` when it has none), as
    ``float()`` reads it; and which of them were read (False: an other form, its value
    undefined). ``chunk`` is :func:`chunks` of ``buf``, which holds at least MARGIN bytes
    before any ``start``."""
    neg = buf[start] == 45  # "-"
    has_point = point < end
    frac = end - point  # digits after the point
    frac -= 1
    np.maximum(frac, 0, out=frac)
    digits = point - start
    digits -= neg
    digits += frac
    ok = (digits - 1).view(np.uint64) < np.uint64(MAX_DIGITS)  # 1 to 15 digits
    np.minimum(frac, MAX_DIGITS, out=frac)
    np.minimum(digits, MAX_DIGITS, out=digits)
    # which bytes of the last 16 before the end are kept: the fraction's, the digits'
    f_low = np.minimum(frac, 8)
    d_low = np.minimum(digits, 8)
    keep_f0, keep_d0 = _HIGH[f_low], _HIGH[d_low]
    f_low -= frac
    np.negative(f_low, out=f_low)
    d_low -= digits
    np.negative(d_low, out=d_low)
    keep_f1, keep_d1 = _HIGH[f_low], _HIGH[d_low]
    # the 24 bytes before the end, in one read: the digits without the point,
    # right-aligned in two words, those after the point where they are, those before it
    # moved one byte on (closing the point's gap)
    got = chunk[end - 24].view("<u8").reshape(-1, 3)
    c0, c1, c2 = got[:, 0], got[:, 1], got[:, 2]
    one = has_point.view(np.uint8).astype(np.uint64)
    shift = one << np.uint64(3)
    keep_d0 ^= keep_f0  # the digits before the point
    keep_d1 ^= keep_f1
    low = c2 << shift
    low |= (c1 >> np.uint64(56)) * one
    low &= keep_d0
    low |= c2 & keep_f0
    high = c1 << shift
    high |= (c0 >> np.uint64(56)) * one
    high &= keep_d1
    high |= c1 & keep_f1
    keep_d0 |= keep_f0  # every digit
    keep_d1 |= keep_f1
    # digits only: each kept byte minus "0" (by XOR) must be 0 to 9
    low ^= _ZEROS & keep_d0
    high ^= _ZEROS & keep_d1
    bad = low + _SIX
    bad |= low
    bad2 = high + _SIX
    bad2 |= high
    bad |= bad2
    bad &= _HIGH_NIBBLES
    ok &= bad == 0
    value = _eight(high)
    value *= _E8
    value += _eight(low)
    x = value.astype(np.float64)
    x /= _POW10[frac]
    np.negative(x, out=x, where=neg)
    return x, ok


def parse_texts(texts: list[bytes]) -> F64:
    """The numbers of ``texts`` by numpy's parse (as float() reads them), for the forms
    :func:`parse_fields` leaves; ValueError for anything but finite decimal numbers."""
    joined = b" ".join(texts)
    arr = np.frombuffer(joined, dtype=np.uint8)
    # digits, signs, points, exponents and spaces only: no letter past "e" (inf and nan
    # are refused)
    if len(arr) and int(arr.max()) > 0x65:
        raise ValueError("not a number")
    with warnings.catch_warnings():
        warnings.simplefilter("error")
        try:
            values: Any = np.fromstring(joined, dtype=np.float64, sep=" ")
        except DeprecationWarning:
            raise ValueError("not a number") from None
    if len(values) != len(texts) or not np.all(np.isfinite(values)):
        raise ValueError("not a number")
    return np.asarray(values, dtype=np.float64)
