#!/usr/bin/env python3
"""Paired bootstrap: the vectorised resampler against a plain per-resample Python loop.

Prints medians over repeats and the ratio, both measured in this run.
"""

from __future__ import annotations

import sys

import numpy as np
from benchkit import like_the_command_line, median_seconds

from rescore.significance import paired_bootstrap


def plain(before: list[int], after: list[int], words: list[int], resamples: int,
          seed: int) -> float:
    """The obvious version: one resample at a time, sums in Python."""
    rng = np.random.default_rng(seed)
    n = len(before)
    wins = 0
    for _ in range(resamples):
        idx = rng.integers(0, n, size=n).tolist()
        w = sum(words[i] for i in idx)
        wins += sum(after[i] for i in idx) < sum(before[i] for i in idx) and w > 0
    return wins / resamples


def main(argv: list[str]) -> int:
    quick = "--quick" in argv
    like_the_command_line()
    n, resamples, repeats = (300, 200, 3) if quick else (2000, 1000, 5)
    rng = np.random.default_rng(0)
    words = rng.integers(3, 20, size=n)
    before = rng.binomial(words, 0.15)
    after = rng.binomial(words, 0.12)
    b, a, w = before.tolist(), after.tolist(), words.tolist()
    fast = median_seconds(lambda: paired_bootstrap(before, after, words, resamples=resamples,
                                                   seed=1), repeats)
    slow = median_seconds(lambda: plain(b, a, w, resamples, 1), repeats)
    print(f"paired bootstrap, {n} utterances x {resamples} resamples, median of {repeats}:")
    print(f"  plain loop   {slow * 1e3:9.1f} ms  (baseline)")
    print(f"  vectorised   {fast * 1e3:9.1f} ms  ({slow / fast:.1f}x faster)")
    full = median_seconds(lambda: paired_bootstrap(before, after, words, resamples=10_000,
                                                   seed=1), 1 if quick else 3)
    print(f"  vectorised, 10000 resamples: {full * 1e3:.1f} ms")
    return 0


if __name__ == "__main__":
    raise SystemExit(main(sys.argv[1:]))
