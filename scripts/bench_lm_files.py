"""Model files at real size: ARPA import and export, the compact native file, look-ups.

A 4-gram (modified Kneser-Ney) from 3 million Zipfian words over 50,000 words (the corpus
generator of bench_lm.py, fixed seed; about 6.5 million n-grams). Every figure has its
baseline measured in the same run on the same file:

- ARPA export: the vectorised writer against the line-by-line writer (the same bytes);
- ARPA import (``lm convert model.arpa model.lm``, a whole process, wall time and peak
  memory): against the exact line-by-line reader in a process of its own;
- the native file: bytes per n-gram, load time and look-ups per second of format 3 against
  format 2 (the previous format, written by ``store.save_legacy``);
- ``--quantize 8`` and ``16``: bytes per n-gram and the relative change of held-out
  perplexity against the exact model.

Medians of 3 runs (5 for loading); a baseline slower than 20 s is timed once and says so.
``--quick`` runs a 300,000-word version (the targets are for the full size).

    PYTHONPATH=. python scripts/bench_lm_files.py [--quick]
"""

from __future__ import annotations

import argparse
import statistics
import subprocess
import sys
import tempfile
import time
from collections.abc import Callable
from pathlib import Path
from typing import Any

import numpy as np
from bench_lm import SEED, baseline_time, median_time, sentences_of, target, zipf_corpus
from benchkit import like_the_command_line

from rescore.lm import NGramModel, arpa, load_model, save_model, store
from rescore.lm.tables import BackoffTables

ROOT = Path(__file__).resolve().parent.parent

# the peak resident memory of this process image (VmHWM in /proc: ru_maxrss would include
# the parent's, carried across exec on Linux)
_PEAK = """
def peak():
    for line in open("/proc/self/status"):
        if line.startswith("VmHWM:"):
            return int(line.split()[1]) * 1024
    return 0
"""

_CHILD = _PEAK + """
import sys, time
sys.argv = ["rescore", "-q", "lm", "convert", sys.argv[1], sys.argv[2]]
from rescore.cli import main
import rescore.lm.arpa, rescore.lm.store
base = peak()
t = time.perf_counter()
try:
    main()
except SystemExit as exc:
    if exc.code:
        raise
print(time.perf_counter() - t, peak(), base)
"""

_EXACT_CHILD = _PEAK + """
import sys, time
from rescore.process import avoid_huge_pages, keep_freed_memory
avoid_huge_pages(); keep_freed_memory()
from rescore.lm import arpa, store
t = time.perf_counter()
tables, meta = arpa.read_exact(sys.argv[1])
store.save(tables, meta, sys.argv[2])
print(time.perf_counter() - t, peak())
"""


def child(code: str, *args: Path) -> tuple[float, ...]:
    """Run ``code`` in a fresh interpreter: its whole wall time, then what it prints (its
    own timing, its peak memory, ...)."""
    t = time.perf_counter()
    out = subprocess.run([sys.executable, "-c", code, *map(str, args)], check=True,
                         capture_output=True, text=True, cwd=ROOT).stdout.split()
    return (time.perf_counter() - t, *map(float, out))


def count_queries(model: NGramModel, sents: list[list[str]]) -> int:
    seen = [0]
    find = BackoffTables.find

    def counting(self: BackoffTables, k: int, q: np.ndarray) -> np.ndarray:
        seen[0] += len(q)
        return find(self, k, q)

    BackoffTables.find = counting  # type: ignore[method-assign,assignment]
    try:
        model.logprob(sents)
    finally:
        BackoffTables.find = find  # type: ignore[method-assign,assignment]
    return seen[0]


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__)
    ap.add_argument("--quick", action="store_true", help="small sizes, about a minute")
    args = ap.parse_args()
    like_the_command_line()
    n_words = 300_000 if args.quick else 3_000_000
    ranks, lengths = zipf_corpus(n_words, np.random.default_rng(SEED))
    model = NGramModel(4, "mkn").fit(sentences_of(ranks, lengths))
    n = sum(model.n_ngrams_)
    print(f"model: 4-gram mkn from {n_words:,} Zipfian words: {n:,} n-grams "
          f"({', '.join(f'{c:,}' for c in model.n_ngrams_)})")
    if args.quick:
        print("--quick: small sizes; the targets are set for the full run")
    with tempfile.TemporaryDirectory() as tmp:
        native, old, text = Path(tmp) / "m.lm", Path(tmp) / "m2.lm", Path(tmp) / "m.arpa"
        save_model(model, native)
        store.save_legacy(model.tables_, model.metadata_, old, version=2)
        per, per_old = native.stat().st_size / n, old.stat().st_size / n
        print(f"native file: {native.stat().st_size / 1e6:.1f} MB = {per:.2f} bytes per n-gram "
              f"{target(per, '<=', 20)}; format 2 of the same model {per_old:.2f}; "
              f"ratio {per_old / per:.2f}x smaller")

        # loading (the look-up structures are in the file: nothing is derived)
        def ready(path: Path) -> Callable[[], Any]:
            def go() -> Any:
                got = load_model(path)
                for k in range(2, got.order_ + 1):
                    got.tables_.find(k, np.zeros(1, dtype=np.uint64))
                return got
            return go

        t_load, loaded = median_time(ready(native), 5)
        t_load_old, loaded_old = median_time(ready(old), 5)
        print(f"load + one look-up per order: {t_load:.3f} s median of 5 "
              f"{target(t_load, '<', 1)}; format 2 {t_load_old:.3f} s")

        # look-ups while scoring held-out text
        held_r, held_l = zipf_corpus(max(n_words // 10, 100_000), np.random.default_rng(SEED + 1))
        held = sentences_of(held_r, held_l)
        queries = count_queries(loaded, held)
        t_new, a = median_time(lambda: loaded.logprob(held), 3)
        t_old, b = median_time(lambda: loaded_old.logprob(held), 3)
        assert np.array_equal(a, b), "format 2 and 3 disagree"
        print(f"score {sum(len(s) + 1 for s in held):,} tokens: {queries:,} look-ups; "
              f"format 3 {queries / t_new / 1e6:.1f} M look-ups/s "
              f"{target(queries / t_new / 1e6, '>=', 5)}, format 2 "
              f"{queries / t_old / 1e6:.1f} M/s (medians of 3); ratio {t_old / t_new:.2f}x "
              f"(the same scores, bit for bit)")

        # quantized copies: size and held-out perplexity against the exact model
        tokens = sum(len(s) + 1 for s in held)
        exact_ppl = float(np.exp(-a.sum() / tokens))
        for bits in (8, 16):
            qpath = Path(tmp) / f"q{bits}.lm"
            save_model(NGramModel.from_tables(model.tables_, model.metadata_).quantize(bits),
                       qpath)
            q_ppl = float(np.exp(-load_model(qpath).logprob(held).sum() / tokens))
            change = q_ppl / exact_ppl - 1
            q_per = qpath.stat().st_size / n
            print(f"--quantize {bits}: {q_per:.2f} bytes per n-gram {target(q_per, '<=', 10)}; "
                  f"held-out perplexity {q_ppl:.3f} against {exact_ppl:.3f} exact: "
                  f"{100 * change:+.3f} % "
                  + (target(abs(100 * change), '<=', 1) if bits == 8 else ""))

        # ARPA export
        lines = Path(tmp) / "lines.arpa"
        t_write, _ = median_time(lambda: arpa.write(loaded.tables_, text), 3)
        t_lines, _, how = baseline_time(lambda: arpa.write_lines(loaded.tables_, lines))
        same = text.read_bytes() == lines.read_bytes()
        lines.unlink()
        rate, rate_lines = n / t_write, n / t_lines
        print(f"ARPA export ({text.stat().st_size / 1e6:.0f} MB): {t_write:.2f} s median of 3 = "
              f"{rate / 1e6:.2f} M n-grams/s {target(rate / 1e6, '>=', 2)}; line-by-line writer "
              f"{rate_lines / 1e6:.2f} M/s ({how}); ratio {t_lines / t_write:.1f}x; "
              f"identical bytes: {same}")

        # ARPA import through the command line, a whole process each time
        back = Path(tmp) / "back.lm"
        runs = [child(_CHILD, text, back) for _ in range(3)]
        wall = statistics.median(r[0] for r in runs)
        peak = max(r[2] for r in runs)
        base = statistics.median(r[3] for r in runs)
        size = back.stat().st_size
        check = load_model(back)
        probe = held[:2000]
        err = float(np.max(np.abs(check.logprob(probe) - loaded.logprob(probe))))
        exact = Path(tmp) / "exact.lm"
        e_wall, e_in, e_peak = child(_EXACT_CHILD, text, exact)[:3]
        rate, e_rate = n / wall, n / e_wall
        print(f"lm convert ARPA -> native: {wall:.2f} s wall median of 3 (whole process) = "
              f"{rate / 1e6:.2f} M n-grams/s {target(rate / 1e6, '>=', 2)}; peak memory "
              f"{peak / 1e6:.0f} MB = {peak / size:.2f}x the native file "
              f"{target(peak / size, '<=', 2)}; {(peak - base) / size:.2f}x above the "
              f"{base / 1e6:.0f} MB of the interpreter and libraries")
        print(f"  exact line reader + save, one process, one run: {e_wall:.1f} s wall "
              f"({e_in:.1f} s reading and saving) = {e_rate / 1e6:.2f} M n-grams/s, peak "
              f"{e_peak / 1e6:.0f} MB; ratio {e_wall / wall:.1f}x in time, "
              f"{e_peak / peak:.1f}x in memory")
        print(f"  the imported model against the original, {len(probe)} held-out sentences: "
              f"largest difference {err:.1e} (natural log; ARPA keeps 10 digits)")


if __name__ == "__main__":
    main()
