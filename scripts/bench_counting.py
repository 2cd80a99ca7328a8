#!/usr/bin/env python3
"""Counting in characters: the character error rate of every hypothesis of the second
demo's test set (rescore.counting.Counting with unit char) against jiwer.cer on the same
strings, and the tuning matrix at the character unit against the word unit on the same
lists (the errors of every hypothesis, no model).

Prints medians over repeats and the ratios, both measured in this run.
"""

from __future__ import annotations

import sys

import jiwer
from benchkit import like_the_command_line, median_seconds

from rescore import pipeline
from rescore.counting import Counting
from rescore.demo_kana import BUNDLED_KANA
from rescore.nbest import read_nbest
from rescore.text import tokens

TEST = BUNDLED_KANA / "test.jsonl"


def main(argv: list[str]) -> int:
    quick = "--quick" in argv
    like_the_command_line()
    refs: list[str] = []
    hyps: list[str] = []
    for utt in read_nbest(TEST):
        for h in utt["hypotheses"]:
            refs.append(utt.get("reference") or "")
            hyps.append(h["text"])
    repeats = 3 if quick else 7
    chars = Counting("char")
    joined_r = ["".join(tokens(t)) for t in refs]
    joined_h = ["".join(tokens(t)) for t in hyps]
    base = median_seconds(lambda: jiwer.cer(joined_r, joined_h), repeats)
    ours = median_seconds(lambda: chars.counts(refs, hyps), repeats)
    print(f"character error counts, {len(refs)} pairs from {TEST.name}, median of {repeats}:")
    print(f"  jiwer.cer (normalised strings)   {base * 1e3:8.1f} ms  (baseline)")
    print(f"  Counting('char').counts (texts)  {ours * 1e3:8.1f} ms  ({ours / base:.2f}x)")
    word = median_seconds(lambda: pipeline.load_matrix(TEST, models={}, features=[]), repeats)
    char = median_seconds(lambda: pipeline.load_matrix(TEST, models={}, features=[],
                                                      counting=chars), repeats)
    print(f"tuning matrix of {TEST.name} (errors of every hypothesis), median of {repeats}:")
    print(f"  word unit                        {word * 1e3:8.1f} ms  (baseline)")
    print(f"  char unit                        {char * 1e3:8.1f} ms  ({char / word:.2f}x)")
    return 0


if __name__ == "__main__":
    sys.exit(main(sys.argv[1:]))
