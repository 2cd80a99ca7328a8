"""Speed of weight tuning on a synthetic dev set, against a re-aligning baseline in the same run.

    python scripts/bench_tune.py [--quick] [--repeats N]

Builds 10,000 utterances x 20 hypotheses of Larkspur Growhouse logbook text (2,000 with
--quick), then times
- grid_search over a 100 x 100 (LM weight, penalty) grid, against the same grid evaluated
  the slow way: at every point choose the 1-best, then re-align every chosen hypothesis
  with jiwer against its reference (timed on a few points and scaled to the whole grid);
- exact_search over 4 weights (LM weight, penalty and two features) from the zero point,
  the bare search alone;
- the full ``tune`` a user runs for those 4 weights (``rescore tune --feature f1 --feature
  f2``): grid search for the start, exact search from the grid's best and its other low
  points, seeded restarts, the depth table; with folds=0, so no cross-validation;
- the 5-fold cross-validation that ``tune`` adds by default (5 more tunings on 4/5 of the
  set), timed on its own (one run: it is the slowest part).
Prints medians and ratios. Each target line prints "met" or "NOT met" from the measured
figure; the targets are for 10,000 utterances x 20 hypotheses, so with --quick the figure
is first scaled linearly to that size (and says so).
"""

from __future__ import annotations

import argparse
import statistics
import sys
import time
from pathlib import Path

import jiwer
import numpy as np

sys.path.insert(0, str(Path(__file__).resolve().parent.parent))

from benchkit import like_the_command_line, median_seconds

from rescore.scoring import FeatureMatrix, choose
from rescore.tune import cross_validate, exact_search, grid_search, tune
from rescore.weights import Weights
from rescore.wer import word_errors

# the size the targets are stated for, and the time limit of the 4-weight search
TARGET_UTTERANCES = 10_000
TARGET_SECONDS = 30.0

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


def realigning_point(matrix: FeatureMatrix, refs: list[str], hyps: list[str],
                     weights: Weights) -> int:
    chosen = choose(matrix, weights) + matrix.offsets[:-1]
    out = jiwer.process_words(refs, [hyps[r] for r in chosen])
    return int(out.substitutions + out.deletions + out.insertions)


def verdict(seconds: float, n_utt: int, limit: float = TARGET_SECONDS) -> str:
    """``met`` / ``NOT met`` for a time measured on ``n_utt`` utterances against a limit
    stated for TARGET_UTTERANCES (scaled linearly when the set is smaller)."""
    scale = TARGET_UTTERANCES / n_utt
    at_size = seconds * scale
    outcome = "met" if at_size < limit else "NOT met"
    where = f"target < {limit:g} s at {TARGET_UTTERANCES:,} x 20"
    if scale == 1:
        return f"{where}: {outcome}"
    return (f"{where}: {outcome} (extrapolated linearly from {n_utt:,} utterances to "
            f"{at_size:.1f} s; run without --quick to judge)")


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--quick", action="store_true", help="2,000 utterances, one repeat")
    parser.add_argument("--repeats", type=int, default=3)
    args = parser.parse_args()
    like_the_command_line()
    n_utt = 2_000 if args.quick else 10_000
    repeats = 1 if args.quick else args.repeats
    matrix, refs, hyps = make_set(n_utt, 20)
    print(f"set: {n_utt} utterances x 20 hypotheses ({matrix.n_hypotheses} rows)")

    lm_grid, pen_grid = np.linspace(0, 30, 100), np.linspace(-20, 20, 100)
    result = grid_search(matrix, lm_grid=lm_grid, penalty_grid=pen_grid)
    fast = median_seconds(lambda: grid_search(matrix, lm_grid=lm_grid, penalty_grid=pen_grid),
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
    print(f"  {verdict(fast, n_utt, limit=10)}; ratio {slow / fast:.0f}x (target >= 50: "
          f"{'met' if slow / fast >= 50 else 'NOT met'})")

    tuned = ("lm", "words", "f1", "f2")
    found = exact_search(matrix, tune=tuned, start=Weights())
    exact = median_seconds(lambda: exact_search(matrix, tune=tuned, start=Weights()), repeats)
    print(f"exact search over 4 weights (bare exact_search from the zero point): median "
          f"{exact:.2f} s; {found.dev_errors} errors, WER {found.dev_wer:.4f} (grid best "
          f"{result.dev_errors}); baseline WER {found.one_best_wer:.4f}, oracle "
          f"{found.oracle_wer:.4f}")
    print(f"  {verdict(exact, n_utt)}")

    features = ("f1", "f2")
    full = tune(matrix, features=features, folds=0)
    if full.search != "exact" or set(full.tuned) != set(tuned):
        raise SystemExit(f"tune ran {full.search} over {full.tuned}, not exact over {tuned}")
    t_full = median_seconds(lambda: tune(matrix, features=features, folds=0), repeats)
    print(f"full tune over 4 weights, folds=0 (what 'rescore tune --feature f1 --feature f2 "
          f"--folds 0' runs: grid start, exact search from {full.settings['starts']} starts, "
          f"{full.settings['restarts']} restarts, depth table): median {t_full:.2f} s; "
          f"{full.dev_errors} errors, WER {full.dev_wer:.4f}; {t_full / exact:.1f}x the "
          "bare exact search")
    print(f"  {verdict(t_full, n_utt)}")

    start = time.perf_counter()
    cv = cross_validate(matrix, search="exact", features=features, folds=5, seed=0)
    t_cv = time.perf_counter() - start
    assert cv is not None
    print(f"5-fold cross-validation of that tune (default --folds 5; 1 run): {t_cv:.2f} s "
          f"= {t_cv / t_full:.1f}x the tune itself; CV WER {cv.wer:.4f}; so "
          f"'rescore tune' with default folds costs about {t_full + t_cv:.1f} s here "
          "(no target; for information)")


if __name__ == "__main__":
    main()
