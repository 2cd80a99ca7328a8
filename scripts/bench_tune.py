"""Speed of weight tuning on a synthetic dev set, against a re-aligning baseline in the same run.

    python scripts/bench_tune.py [--quick] [--repeats N]

Builds 10,000 utterances x 20 hypotheses of Larkspur Growhouse logbook text (2,000 with
--quick), then times
- grid_search over a 100 x 100 (LM weight, penalty) grid, against the same grid evaluated
  the slow way: at every point choose the 1-best, then re-align every chosen hypothesis
  with jiwer against its reference (timed on a few points and scaled to the whole grid);
- exact_search over 4 weights (LM weight, penalty and two features) from the zero point.
Prints medians and ratios.
"""

from __future__ import annotations

import argparse
import statistics
import sys
import time
from collections.abc import Callable
from pathlib import Path

import jiwer
import numpy as np

sys.path.insert(0, str(Path(__file__).resolve().parent.parent))

from rescore.scoring import FeatureMatrix, Weights, choose
from rescore.tune import exact_search, grid_search
from rescore.wer import word_errors

VOCAB = (
    "bay", "one", "two", "three", "four", "five", "six", "seven", "eight",
    "nine", "ten", "row", "rack", "tray", "basil", "lettuce", "kale", "chard",
    "ph", "ec", "reading", "pump", "vent", "lamp", "opened", "closed", "at",
    "percent", "point", "zero", "shift", "note", "flushed", "nutrient", "tank", "level",
    "low", "high", "checked", "seeded", "harvested", "crew", "dosed", "timer", "set",
    "to", "minutes", "the", "and", "on", "off",
)


def make_set(n_utt: int, depth: int, seed: int = 0) -> tuple[FeatureMatrix, list[str], list[str]]:
    """A matrix plus reference and hypothesis texts; the first hypothesis is the recognizer's."""
    rng = np.random.default_rng(seed)
    refs: list[str] = []
    hyps: list[str] = []
    rows: list[list[float]] = []
    errs: list[int] = []
    ref_words: list[int] = []
    for _ in range(n_utt):
        ref = list(rng.choice(VOCAB, size=int(rng.integers(5, 13))))
        block = []
        for _ in range(depth):
            hyp = list(ref)
            for _ in range(int(rng.poisson(2.5))):
                kind = rng.integers(3)
                pos = int(rng.integers(len(hyp) + 1))
                if kind == 0 and hyp and pos < len(hyp):
                    hyp[pos] = str(rng.choice(VOCAB))
                elif kind == 1 and hyp and pos < len(hyp):
                    del hyp[pos]
                else:
                    hyp.insert(pos, str(rng.choice(VOCAB)))
            e = word_errors(ref, hyp)
            # the same audio under every hypothesis: acoustic scores do not grow with length
            acoustic = -600.0 - 1.0 * e + rng.normal(0.0, 4.0)
            lm = -4.0 * len(hyp) - 1.2 * e + rng.normal(0.0, 2.0)
            f1 = -0.5 * e + rng.normal(0.0, 1.5)
            f2 = rng.normal(0.0, 1.0)
            block.append((acoustic + 0.5 * lm, [acoustic, lm, float(len(hyp)), f1, f2],
                          " ".join(hyp), e))
        block.sort(key=lambda item: -item[0])  # recognizer's own order
        refs.append(" ".join(ref))
        ref_words.append(len(ref))
        for _, values, text, e in block:
            rows.append(values)
            hyps.append(text)
            errs.append(e)
    matrix = FeatureMatrix(
        names=("acoustic", "lm", "words", "f1", "f2"), values=np.array(rows),
        offsets=np.arange(0, n_utt * depth + 1, depth, dtype=np.int64),
        ids=tuple(f"bay-{i:05d}" for i in range(n_utt)),
        errors=np.array(errs, dtype=np.int64), ref_words=np.array(ref_words, dtype=np.int64))
    return matrix, refs, hyps


def median_time(fn: Callable[[], object], repeats: int) -> float:
    times = []
    for _ in range(repeats):
        start = time.perf_counter()
        fn()
        times.append(time.perf_counter() - start)
    return statistics.median(times)


def realigning_point(matrix: FeatureMatrix, refs: list[str], hyps: list[str],
                     weights: Weights) -> int:
    chosen = choose(matrix, weights) + matrix.offsets[:-1]
    out = jiwer.process_words(refs, [hyps[r] for r in chosen])
    return int(out.substitutions + out.deletions + out.insertions)


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--quick", action="store_true", help="2,000 utterances, one repeat")
    parser.add_argument("--repeats", type=int, default=3)
    args = parser.parse_args()
    n_utt = 2_000 if args.quick else 10_000
    repeats = 1 if args.quick else args.repeats
    matrix, refs, hyps = make_set(n_utt, 20)
    print(f"set: {n_utt} utterances x 20 hypotheses ({matrix.n_hypotheses} rows)")

    lm_grid, pen_grid = np.linspace(0, 30, 100), np.linspace(-20, 20, 100)
    result = grid_search(matrix, lm_grid=lm_grid, penalty_grid=pen_grid)
    fast = median_time(lambda: grid_search(matrix, lm_grid=lm_grid, penalty_grid=pen_grid),
                       repeats)
    rng = np.random.default_rng(1)
    probe = [(int(rng.integers(100)), int(rng.integers(100))) for _ in range(3)]
    slow_times = []
    for i, j in probe:
        weights = Weights(lm_weight=float(lm_grid[i]), insertion_penalty=float(pen_grid[j]))
        start = time.perf_counter()
        errors = realigning_point(matrix, refs, hyps, weights)
        slow_times.append(time.perf_counter() - start)
        if errors != result.surface.errors[i, j]:  # type: ignore[union-attr]
            raise SystemExit(f"mismatch at grid point {i},{j}: {errors} re-aligned, "
                             f"{result.surface.errors[i, j]} from the grid")  # type: ignore[union-attr]
    slow = statistics.median(slow_times) * lm_grid.size * pen_grid.size
    print(f"grid 100x100: median {fast:.2f} s; re-aligning baseline {slow:.0f} s "
          f"(median {statistics.median(slow_times) * 1e3:.0f} ms a point x 10,000, "
          f"{len(probe)} points timed, errors equal); ratio {slow / fast:.0f}x; "
          f"best {result.dev_errors} errors, WER {result.dev_wer:.4f}")

    tuned = ("lm", "words", "f1", "f2")
    found = exact_search(matrix, tune=tuned, start=Weights())
    exact = median_time(lambda: exact_search(matrix, tune=tuned, start=Weights()), repeats)
    print(f"exact search over 4 weights: median {exact:.2f} s; {found.dev_errors} errors, "
          f"WER {found.dev_wer:.4f} (grid best {result.dev_errors}); "
          f"baseline WER {found.baseline_wer:.4f}, oracle {found.oracle_wer:.4f}")


if __name__ == "__main__":
    main()
