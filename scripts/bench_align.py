#!/usr/bin/env python3
"""Word alignments for the report: jiwer's alignment alone against the same alignment with
the look-alike tie-break (rescore.wer.align_many), and against the alignment under scoring
rules (rescore.align, a dynamic programme in Python), on every hypothesis of the demo test set.

Prints medians over repeats and the ratio, both measured in this run.
"""

from __future__ import annotations

import sys
from collections.abc import Sequence
from pathlib import Path

import jiwer
from benchkit import like_the_command_line, median_seconds

from rescore.align import align_with_rules
from rescore.nbest import read_nbest
from rescore.rules import ScoringRules
from rescore.text import tokens
from rescore.wer import Alignment, _jiwer_ops, align_many

DEMO_TEST = Path(__file__).resolve().parent.parent / "fixtures" / "demo" / "test.jsonl"


def jiwer_only(refs: Sequence[list[str]], hyps: Sequence[list[str]]) -> list[Alignment]:
    """Today's alignment before the tie-break: one jiwer call, chunks spelt out."""
    result = jiwer.process_words([" ".join(r) for r in refs], [" ".join(h) for h in hyps])
    return [Alignment(tuple(_jiwer_ops(r, h, c)))
            for r, h, c in zip(refs, hyps, result.alignments, strict=True)]


def main(argv: list[str]) -> int:
    quick = "--quick" in argv
    like_the_command_line()
    refs: list[list[str]] = []
    hyps: list[list[str]] = []
    for utt in read_nbest(DEMO_TEST):
        ref = tokens(utt.get("reference") or "")
        for h in utt["hypotheses"]:
            hyp = tokens(h["text"])
            if ref and hyp:  # jiwer refuses empty sides; align_many handles them apart
                refs.append(ref)
                hyps.append(hyp)
    if quick:
        refs, hyps = refs[:2000], hyps[:2000]
    repeats = 3 if quick else 7
    base = median_seconds(lambda: jiwer_only(refs, hyps), repeats)
    fast = median_seconds(lambda: align_many(refs, hyps), repeats)
    changed = sum(a.ops != b.ops for a, b in zip(jiwer_only(refs, hyps),
                                                  align_many(refs, hyps), strict=True))
    print(f"word alignments, {len(refs)} pairs from {DEMO_TEST.name}, median of {repeats}:")
    print(f"  jiwer alone       {base * 1e3:9.1f} ms  (baseline)")
    print(f"  with tie-break    {fast * 1e3:9.1f} ms  ({fast / base:.2f}x the baseline)")
    rules = ScoringRules(optional=("uh", "um"), equivalent=(("ok", "okay"),))
    ruled = median_seconds(lambda: align_with_rules(refs, hyps, rules), 1 if quick else 3)
    print(f"  under rules       {ruled * 1e3:9.1f} ms  ({ruled / base:.2f}x the baseline)")
    print(f"  alignments re-paired by the tie-break: {changed}")
    return 0


if __name__ == "__main__":
    sys.exit(main(sys.argv[1:]))
