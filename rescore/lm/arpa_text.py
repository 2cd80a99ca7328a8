"""What the ARPA readers and writers share: the conventions of the text, its numbers.

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

import numpy as np
import numpy.typing as npt

F64 = npt.NDArray[np.float64]
I64 = npt.NDArray[np.int64]
LOG10E = 1.0 / math.log(10.0)
ZERO = -99.0  # log10 of "never"
NUDGED_ZERO = "-99.0000001"  # a real probability that would otherwise print as -99
MAX_LINE_BYTES = 1 << 20  # an n-gram line is a few words and numbers; refuse runaway lines
# bounded digit runs: int() of thousands of digits raises ValueError, not our error
NGRAM_LINE = re.compile(r"^ngram\s+([0-9]{1,6})\s*=\s*([0-9]{1,15})$")
SECTION = re.compile(r"^\\([0-9]{1,6})-grams:$")


def fmt(values: F64) -> list[str]:
    log10 = values * LOG10E
    out = []
    for x in log10.tolist():
        if not math.isfinite(x):
            out.append(f"{ZERO:g}")
            continue
        text = f"{x:.10g}"
        out.append(NUDGED_ZERO if float(text) == ZERO else text)
    return out


def ln10(values: F64) -> F64:
    """Natural logs of log10 values, in place; exactly -99 is the conventional zero."""
    zero = values == ZERO
    values /= LOG10E
    values[zero] = -math.inf
    return values
