"""End-to-end speed of `rescore apply`: parse, validate, normalise, score, choose, write.

N-best records of 20 hypotheses of about 15 words, scored with a trigram model built from
a synthetic Zipfian corpus (10 million words; 1 million with --quick). Each configuration
runs the real command in a subprocess (start-up included) and reports the median of three
runs; ratios are against the single-process run measured here, in the same run.

    PYTHONPATH=. python scripts/bench_apply.py [--quick]
"""

from __future__ import annotations

import argparse
import json
import os
import statistics
import subprocess
import sys
import tempfile
import time
from pathlib import Path

import numpy as np

VOCAB = 50_000
SEED = 20261201


def zipf_words(rng: np.random.Generator, n: int) -> np.ndarray:
    p = 1.0 / np.arange(1, VOCAB + 1) ** 1.05
    return rng.choice(VOCAB, size=n, p=p / p.sum())


def write_corpus(path: Path, n_words: int, rng: np.random.Generator) -> None:
    ranks = zipf_words(rng, n_words)
    words = np.array([f"w{i}" for i in range(VOCAB)])
    with open(path, "w") as fh:
        for start in range(0, n_words, 15):
            fh.write(" ".join(words[ranks[start:start + 15]]) + "\n")


def write_nbest(path: Path, n_utt: int, rng: np.random.Generator) -> None:
    words = np.array([f"w{i}" for i in range(VOCAB)])
    with open(path, "w") as fh:
        for u in range(n_utt):
            base = zipf_words(rng, 15)
            hyps = []
            for h in range(20):
                ranks = base.copy()
                flip = rng.random(15) < 0.15
                ranks[flip] = zipf_words(rng, int(flip.sum()))
                hyps.append({"text": " ".join(words[ranks]),
                             "acoustic": round(float(-450 - 3 * h + rng.normal()), 3)})
            fh.write(json.dumps({"id": f"bench-{u:07d}", "hypotheses": hyps}) + "\n")


def timed(args: list[str], repeats: int) -> float:
    times = []
    for _ in range(repeats):
        start = time.perf_counter()
        subprocess.run(args, check=True, stdout=subprocess.DEVNULL, stderr=subprocess.DEVNULL)
        times.append(time.perf_counter() - start)
    return statistics.median(times)


def main() -> None:
    parser = argparse.ArgumentParser()
    parser.add_argument("--quick", action="store_true")
    opts = parser.parse_args()
    n_words = 1_000_000 if opts.quick else 10_000_000
    n_utt = 5_000 if opts.quick else 20_000
    rng = np.random.default_rng(SEED)
    with tempfile.TemporaryDirectory() as tmp:
        folder = Path(tmp)
        corpus, nbest, model = folder / "corpus.txt", folder / "bench.jsonl", folder / "tri.lm"
        write_corpus(corpus, n_words, rng)
        write_nbest(nbest, n_utt, rng)
        head = folder / "head.jsonl"  # a tenth of the set, to separate start-up from rate
        with open(nbest) as src, open(head, "w") as dst:
            for _, line in zip(range(n_utt // 10), src, strict=False):
                dst.write(line)
        rescore = [sys.executable, "-m", "rescore", "--quiet"]
        start = time.perf_counter()
        subprocess.run([*rescore, "lm", "build", str(corpus), "--order", "3", "-o", str(model)],
                       check=True)
        print(f"trigram mkn from {n_words:,} words built in {time.perf_counter() - start:.1f} s")
        weights = folder / "w.json"
        weights.write_text(json.dumps({"acoustic_scale": 1.0, "lm_weight": 0.8,
                                       "insertion_penalty": 0.5, "features": {}}))
        def cmd(src: Path, out: str, *extra: str) -> list[str]:
            return [*rescore, "apply", str(src), "--lm", str(model), "--weights", str(weights),
                    "-o", str(folder / out), *extra]

        repeats = 1 if opts.quick else 3
        configs = {"1 process": (), "--workers 2": ("--workers", "2")}
        results, marginal = {}, {}
        for name, extra in configs.items():
            results[name] = timed(cmd(nbest, f"{len(results)}.jsonl", *extra), repeats)
            small = timed(cmd(head, "head.out.jsonl", *extra), repeats)
            marginal[name] = (n_utt - n_utt // 10) / max(results[name] - small, 1e-9)
        base = cmd(nbest, "c.jsonl")[:-2]
        cluster = timed([*base, "-o", str(folder / "c.jsonl"), "--cluster", "local",
                         "--workers", "2"], 1)
        same = (folder / "0.jsonl").read_bytes() == (folder / "1.jsonl").read_bytes() == \
            (folder / "c.jsonl").read_bytes()
    one = results["1 process"]
    print(f"apply, {n_utt:,} utterances x 20 hypotheses x 15 words "
          f"(median of {1 if opts.quick else 3}, start-up included):")
    for name, seconds in results.items():
        print(f"  {name:<14} {seconds:6.2f} s  {n_utt / seconds:8.0f} utt/s  "
              f"{one / seconds:4.2f} x 1 process")
    print("marginal rate (start-up excluded: the full set minus its first tenth):")
    for name, rate in marginal.items():
        print(f"  {name:<14} {rate:8.0f} utt/s  {rate / marginal['1 process']:4.2f} x 1 process")
    print(f"  {'--cluster local':<14} {cluster:6.2f} s  {n_utt / cluster:8.0f} utt/s  "
          f"{one / cluster:4.2f} x 1 process (correctness on 2 cores; no target)")
    print(f"  outputs byte-identical: {same}")
    print("  targets: >= 5,000 utt/s in 1 process; --workers 2 >= 1.6 x that; "
          f"cores here: {os.cpu_count()}")


if __name__ == "__main__":
    main()
