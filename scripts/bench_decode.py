#!/usr/bin/env python3
"""Minimum-risk choice and consensus on lists of 20 hypotheses x 15 words.

Times `rescore.decode.choice.decide` (posteriors, codes, pairwise distances or the
confusion network, word confidences: everything but reading and writing files) against
plain-Python loops measured in the same run: for min-risk, one edit distance per pair of
hypotheses (`rescore.wer.word_errors`) and sums in Python; for consensus, the same
pivot-alignment construction with a dynamic-programming alignment in Python. Prints
medians over repeats and ratios; the target is 2,000 utterances per second on one core.
"""

from __future__ import annotations

import dataclasses
import json
import sys
import tempfile
from pathlib import Path

import numpy as np
from benchkit import like_the_command_line, median_seconds

from rescore.decode.choice import decide
from rescore.decode.posterior import posteriors
from rescore.pipeline import apply_file
from rescore.weights import Weights
from rescore.wer import word_errors

TARGET = 2000.0  # utterances per second
DEPTH, LENGTH, VOCAB = 20, 15, 2000


def make_lists(n: int, seed: int = 0) -> tuple[list[list[str]], np.ndarray, np.ndarray]:
    """``n`` lists: each a reference of LENGTH words and DEPTH variants with 0-3 edits."""
    rng = np.random.default_rng(seed)
    words = [f"w{i}" for i in range(VOCAB)]
    hyps: list[list[str]] = []
    for _ in range(n):
        ref = [words[k] for k in rng.integers(0, VOCAB, size=LENGTH)]
        for _ in range(DEPTH):
            h = list(ref)
            for _ in range(int(rng.integers(0, 4))):
                op, at = int(rng.integers(0, 3)), int(rng.integers(0, len(h) or 1))
                if op == 0 and h:
                    h[at] = words[int(rng.integers(0, VOCAB))]
                elif op == 1 and h:
                    del h[at]
                else:
                    h.insert(at, words[int(rng.integers(0, VOCAB))])
            hyps.append(h)
    offsets = np.arange(0, n * DEPTH + 1, DEPTH, dtype=np.int64)
    totals = rng.normal(0.0, 3.0, size=n * DEPTH)
    return hyps, offsets, totals


def plain_min_risk(hyps: list[list[str]], offsets: np.ndarray, post: list[float]) -> list[int]:
    rows = []
    for u in range(len(offsets) - 1):
        a, b = int(offsets[u]), int(offsets[u + 1])
        risks = [sum(post[g] * word_errors(hyps[h], hyps[g]) for g in range(a, b))
                 for h in range(a, b)]
        rows.append(a + risks.index(min(risks)))
    return rows


def _align(pivot: list[str], other: list[str]) -> list[tuple[int | None, int | None]]:
    """Pairs (pivot index or None, other index or None) of a minimum-edit alignment."""
    n, m = len(pivot), len(other)
    cost = [[0] * (m + 1) for _ in range(n + 1)]
    for i in range(n + 1):
        cost[i][0] = i
    for j in range(m + 1):
        cost[0][j] = j
    for i in range(1, n + 1):
        for j in range(1, m + 1):
            cost[i][j] = min(cost[i - 1][j] + 1, cost[i][j - 1] + 1,
                             cost[i - 1][j - 1] + (pivot[i - 1] != other[j - 1]))
    pairs: list[tuple[int | None, int | None]] = []
    i, j = n, m
    while i or j:
        if i and j and cost[i][j] == cost[i - 1][j - 1] + (pivot[i - 1] != other[j - 1]):
            pairs.append((i - 1, j - 1))
            i, j = i - 1, j - 1
        elif i and cost[i][j] == cost[i - 1][j] + 1:
            pairs.append((i - 1, None))
            i -= 1
        else:
            pairs.append((None, j - 1))
            j -= 1
    return pairs[::-1]


def plain_consensus(hyps: list[list[str]], offsets: np.ndarray, post: list[float],
                    ) -> list[list[str]]:
    out = []
    for u in range(len(offsets) - 1):
        a, b = int(offsets[u]), int(offsets[u + 1])
        top = max(range(a, b), key=lambda r: post[r])
        pivot = hyps[top]
        slots: list[dict[str, float]] = [{} for _ in pivot]
        gaps: dict[tuple[int, int], dict[str, float]] = {}
        for r in range(a, b):
            gap, k = 0, 0
            for i, j in _align(pivot, hyps[r]):
                if i is not None:
                    word = "" if j is None else hyps[r][j]
                    slots[i][word] = slots[i].get(word, 0.0) + post[r]
                    gap, k = i + 1, 0
                else:
                    assert j is not None
                    bin_ = gaps.setdefault((gap, k), {})
                    bin_[hyps[r][j]] = bin_.get(hyps[r][j], 0.0) + post[r]
                    k += 1
        words = []
        for g in range(len(pivot) + 1):
            for key in sorted(k for k in gaps if k[0] == g):
                bin_ = gaps[key]
                best = max(bin_, key=bin_.__getitem__)
                if bin_[best] > 1.0 - sum(bin_.values()):
                    words.append(best)
            if g < len(pivot):
                best = max(slots[g], key=slots[g].__getitem__)
                if best:
                    words.append(best)
        out.append(words)
    return out


def main(argv: list[str]) -> int:
    quick = "--quick" in argv
    like_the_command_line()
    n, n_plain, repeats = (300, 30, 3) if quick else (2000, 100, 5)
    hyps, offsets, totals = make_lists(n)
    post = posteriors(totals, offsets, 1.0).tolist()
    small = int(offsets[n_plain])
    print(f"{n} lists of {DEPTH} hypotheses x about {LENGTH} words (plain loops on "
          f"{n_plain}), median of {repeats}, one core:")
    failed = 0
    for rule, plain in (("min-risk", plain_min_risk), ("consensus", plain_consensus)):
        fast = median_seconds(lambda rule=rule: decide(hyps, offsets, totals, scale=1.0,
                                                       rule=rule), repeats) / n
        slow = median_seconds(lambda plain=plain: plain(hyps[:small], offsets[:n_plain + 1],
                                                        post[:small]), repeats) / n_plain
        rate = 1.0 / fast
        met = rate >= TARGET
        failed += not met
        print(f"  {rule:<9}  plain loop {slow * 1e6:9.0f} us/utt (baseline)   "
              f"decide {fast * 1e6:7.0f} us/utt = {rate:7.0f} utt/s "
              f"({slow / fast:.0f}x faster); target {TARGET:.0f} utt/s "
              f"{'met' if met else 'NOT met'}")
    best = median_seconds(lambda: decide(hyps, offsets, totals, scale=1.0, rule="best"),
                          repeats) / n
    print(f"  best (with word confidences): {best * 1e6:.0f} us/utt = {1 / best:.0f} utt/s")
    failed += apply_path(hyps, offsets, totals, repeats)
    return 1 if failed else 0


def apply_path(hyps: list[list[str]], offsets: np.ndarray, totals: np.ndarray,
               repeats: int) -> int:
    """The whole ``apply`` step (read, score, choose, write) on the same lists as an N-best
    file, today's output (no rule) as the baseline; returns how many rules missed TARGET."""
    n = len(offsets) - 1
    with tempfile.TemporaryDirectory() as tmp:
        folder = Path(tmp)
        nbest = folder / "lists.jsonl"
        with open(nbest, "w", encoding="utf-8") as fh:
            for u in range(n):
                a, b = int(offsets[u]), int(offsets[u + 1])
                fh.write(json.dumps({"id": f"u{u}", "hypotheses": [
                    {"text": " ".join(hyps[r]), "acoustic": float(totals[r])}
                    for r in range(a, b)]}) + "\n")
        plain = Weights()
        baseline = median_seconds(lambda: apply_file(nbest, folder / "o.jsonl", models={},
                                                     weights=plain), repeats) / n
        print(f"  apply path, {n} lists: today's output {baseline * 1e6:.0f} us/utt = "
              f"{1 / baseline:.0f} utt/s (baseline)")
        failed = 0
        for rule in ("best", "min-risk", "consensus"):
            w = dataclasses.replace(plain, posterior_scale=1.0, choose=rule)
            t = median_seconds(lambda w=w: apply_file(nbest, folder / "o.jsonl", models={},
                                                      weights=w), repeats) / n
            met = 1 / t >= TARGET
            failed += rule != "best" and not met
            print(f"  apply --choose {rule:<9} {t * 1e6:6.0f} us/utt = {1 / t:6.0f} utt/s "
                  f"({t / baseline:.2f}x the baseline's time); target {TARGET:.0f} utt/s "
                  f"{'met' if met else 'NOT met'}")
    return failed


if __name__ == "__main__":
    raise SystemExit(main(sys.argv[1:]))
