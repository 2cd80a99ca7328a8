"""Speed of the language-model engine against plain dict baselines measured in the same run.

Synthetic Zipfian corpus over a 50,000-word vocabulary (fixed seed). Prints medians and
ratios, and after each target whether this run's figure met it. The engine's timings are
medians of 3 runs; so are the dict baselines' when one run takes under 20 s, else the
output says it is a single run. ``--quick`` runs a small version in well under a minute
(the targets are set for the full sizes, so there they are only indicative).

    PYTHONPATH=. python scripts/bench_lm.py [--quick]
"""

from __future__ import annotations

import argparse
import resource
import statistics
import subprocess
import sys
import tempfile
import time
from collections import Counter, defaultdict
from collections.abc import Callable, Sequence
from pathlib import Path
from typing import Any

import numpy as np
from benchkit import like_the_command_line, median_time

from rescore.lm import NGramModel, load_model
from rescore.lm.counts import count_ngrams, window_floor
from rescore.lm.tables import BackoffTables
from rescore.lm.vocab import stream_from_lengths

VOCAB = 50_000
SEED = 20240611
REPEATS = 3
SINGLE_RUN_OVER = 20.0  # seconds: a baseline slower than this is timed once


def baseline_time(fn: Callable[[], Any]) -> tuple[float, Any, str]:
    """Median of REPEATS runs, or one run when the first takes SINGLE_RUN_OVER or more."""
    t = time.perf_counter()
    out = fn()
    first = time.perf_counter() - t
    if first >= SINGLE_RUN_OVER:
        return first, out, f"single run ({first:.0f} s, over {SINGLE_RUN_OVER:.0f} s)"
    times = [first]
    for _ in range(REPEATS - 1):
        t = time.perf_counter()
        out = fn()
        times.append(time.perf_counter() - t)
    return statistics.median(times), out, f"median of {REPEATS}"


def target(value: float, op: str, limit: float) -> str:
    """'(target OP LIMIT: met)' or '... NOT met', judged on this run's measured value."""
    ok = {">=": value >= limit, "<=": value <= limit, "<": value < limit}[op]
    return f"(target {op} {limit:g}: {'met' if ok else 'NOT met'})"


def zipf_corpus(n_tokens: int, rng: np.random.Generator) -> tuple[np.ndarray, np.ndarray]:
    """Word ranks 0..VOCAB-1 with P(r) ~ 1/(r+1)^1.05, and sentence lengths 3..20."""
    p = 1.0 / np.arange(1, VOCAB + 1) ** 1.05
    ranks = rng.choice(VOCAB, size=n_tokens, p=p / p.sum()).astype(np.int32)
    lengths = rng.integers(3, 21, size=n_tokens // 6 + 10)
    lengths = lengths[: np.searchsorted(np.cumsum(lengths), n_tokens) + 1]
    lengths[-1] -= int(lengths.sum()) - n_tokens
    return ranks, lengths[lengths > 0]


def sentences_of(ranks: np.ndarray, lengths: np.ndarray) -> list[list[str]]:
    words = [f"w{i}" for i in range(VOCAB)]
    bounds = np.cumsum(lengths)[:-1]
    return [[words[i] for i in part] for part in np.split(ranks, bounds)]


# --- dict baselines ---------------------------------------------------------------------

def dict_counts(sents: Sequence[Sequence[str]], order: int) -> list[Counter[tuple[str, ...]]]:
    counts: list[Counter[tuple[str, ...]]] = [Counter() for _ in range(order + 1)]
    for s in sents:
        p = ["<s>", *s, "</s>"]
        for i in range(len(p)):
            for n in range(1, min(order, i + 1) + 1):
                counts[n][tuple(p[i - n + 1:i + 1])] += 1
    return counts


def dict_build_mkn(sents: Sequence[Sequence[str]], order: int) -> dict[tuple[str, ...], float]:
    """Interpolated modified Kneser-Ney probabilities of every n-gram, with plain dicts."""
    raw = dict_counts(sents, order)
    raw[1].pop(("<s>",), None)
    used: list[dict[tuple[str, ...], float]] = [{}]
    for n in range(1, order + 1):
        if n == order:
            used.append(dict(raw[n]))
            continue
        cont: defaultdict[tuple[str, ...], float] = defaultdict(float)
        for g in raw[n + 1]:
            cont[g[1:]] += 1
        used.append({g: (c if g[0] == "<s>" else cont[g]) for g, c in raw[n].items()})
    predictable = len(raw[1]) + 1
    prob: dict[tuple[str, ...], float] = {}
    for n in range(1, order + 1):
        cc = Counter(min(int(c), 5) for c in used[n].values() if c > 0)
        n1, n2, n3, n4 = (cc[1], cc[2], cc[3], cc[4])
        y = n1 / (n1 + 2 * n2) if n1 + n2 else 0.5
        d = [0.0, 1 - 2 * y * n2 / max(n1, 1), 2 - 3 * y * n3 / max(n2, 1),
             3 - 4 * y * n4 / max(n3, 1)]
        if min(n1, n2, n3, n4) == 0 or not (0 < d[1] <= 1 and 0 < d[2] <= 2 and 0 < d[3] <= 3):
            d = [0.0] + [y if n1 and n2 else 0.5] * 3
        total: defaultdict[tuple[str, ...], float] = defaultdict(float)
        mass: defaultdict[tuple[str, ...], float] = defaultdict(float)
        for g, c in used[n].items():
            total[g[:-1]] += c
            mass[g[:-1]] += min(c, d[min(int(c), 3)]) if c > 0 else 0.0
        for g, c in used[n].items():
            h = g[:-1]
            disc = d[min(int(c), 3)] if c > 0 else 0.0
            lower = prob[g[1:]] if n > 1 else 1.0 / predictable
            prob[g] = max(c - disc, 0) / total[h] + mass[h] / total[h] * lower
    return prob


def dict_scorer(tables: BackoffTables) -> Callable[[Sequence[Sequence[str]]], list[float]]:
    words = tables.vocab.words
    logp: dict[tuple[str, ...], float] = {}
    bow: dict[tuple[str, ...], float] = {}
    for k in range(1, tables.order + 1):
        grams = [tuple(words[i] for i in row) for row in tables.words_of(k).tolist()]
        logp.update(zip(grams, tables.logp[k - 1].tolist(), strict=True))
        if k < tables.order:
            bow.update(zip(grams, tables.bow[k - 1].tolist(), strict=True))
    known = set(words)
    n = tables.order

    def score(sents: Sequence[Sequence[str]]) -> list[float]:
        out = []
        for s in sents:
            p = ["<s>", *(w if w in known else "<unk>" for w in s), "</s>"]
            total = 0.0
            for i in range(1, len(p)):
                g = tuple(p[max(0, i - n + 1):i + 1])
                extra = 0.0
                while g not in logp:
                    extra += bow.get(g[:-1], 0.0)
                    g = g[1:]
                total += logp[g] + extra
            out.append(total)
        return out

    return score


# --- the benchmark ----------------------------------------------------------------------

def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__)
    ap.add_argument("--quick", action="store_true", help="small sizes, under a minute")
    args = ap.parse_args()
    like_the_command_line()
    n_tokens = 400_000 if args.quick else 10_000_000
    slice_tokens = 100_000 if args.quick else 1_000_000
    repeats = REPEATS
    order = 4
    rng = np.random.default_rng(SEED)
    ranks, lengths = zipf_corpus(n_tokens, rng)
    print(f"corpus: {n_tokens:,} tokens, {len(lengths):,} sentences, vocabulary {VOCAB:,}")
    if args.quick:
        print("--quick: small sizes; the targets are set for the full run, so 'met' here is "
              "only indicative")

    # 1. counting all orders of a 4-gram model from an id array
    ids = ranks + 3  # past the reserved ids
    stream = stream_from_lengths(ids, lengths.astype(np.int64))
    floor = window_floor(stream, False)
    def count() -> Any:
        return count_ngrams(stream.tokens, floor, order, VOCAB + 3)

    # one untimed warm-up run, then the median of 5: on this small virtual machine, the first
    # large allocations after another heavy job (such as the apply benchmark before this one)
    # fault in memory the host has reclaimed, and that cost is the machine's, not counting's
    count()
    t_count, _ = median_time(count, 5)
    sl_len = int(np.searchsorted(np.cumsum(lengths), slice_tokens))
    slice_sents = sentences_of(ranks[: int(lengths[:sl_len].sum())], lengths[:sl_len])
    slice_n = sum(len(s) for s in slice_sents)
    t_dcount, _, how = baseline_time(lambda: dict_counts(slice_sents, order))
    rate, drate = n_tokens / t_count, slice_n / t_dcount
    print(f"count 1..4-grams: {t_count:.3f} s median of 5 after a warm-up run = "
          f"{rate / 1e6:.1f} M tokens/s "
          f"{target(rate / 1e6, '>=', 10)}; dict Counter on a {slice_n:,}-word slice "
          f"{drate / 1e6:.2f} M tokens/s ({how}); ratio {rate / drate:.0f}x")

    # 2. build from a text file through the command line, wall and peak memory
    with tempfile.TemporaryDirectory() as tmp:
        text = Path(tmp) / "corpus.txt"
        sents = sentences_of(ranks, lengths)
        with open(text, "w") as fh:
            fh.writelines(" ".join(s) + "\n" for s in sents)
        model_path = Path(tmp) / "m.lm"
        cmd = [sys.executable, "-c", "from rescore.cli import main; main()", "-q", "lm", "build",
               str(text), "--order", "4", "--method", "mkn", "-o", str(model_path)]
        t0 = time.perf_counter()
        subprocess.run(cmd, check=True)
        wall = time.perf_counter() - t0
        peak_gb = resource.getrusage(resource.RUSAGE_CHILDREN).ru_maxrss / 1e6
        print(f"lm build 4-gram mkn from {n_tokens:,}-word text: {wall:.1f} s wall, one run "
              f"{target(wall, '<=', 60)}, peak {peak_gb:.2f} GB {target(peak_gb, '<=', 6)}")
        t_fit, _ = median_time(lambda: NGramModel(order, "mkn").fit(slice_sents), repeats)
        t_dict, _, how = baseline_time(lambda: dict_build_mkn(slice_sents, order))
        print(f"fit on a {slice_n:,}-word slice: {t_fit:.2f} s median; dict mkn {t_dict:.2f} s "
              f"({how}); ratio {t_dict / t_fit:.1f}x {target(t_dict / t_fit, '>=', 20)}")

        # 3. loading the native file; the hash-key arrays are built on the first look-up at
        # each order, so the figure that counts is load plus one look-up per order
        t_load, model = median_time(lambda: load_model(model_path), repeats)

        def load_and_look_up() -> Any:
            loaded = load_model(model_path)
            for k in range(2, loaded.order_ + 1):
                loaded.tables_.find(k, np.zeros(1, dtype=np.uint64))
            return loaded

        t_ready, _ = median_time(load_and_look_up, repeats)
        size = model_path.stat().st_size / 1e6
        print(f"load native model ({sum(model.n_ngrams_):,} n-grams, {size:.0f} MB): "
              f"{t_load:.3f} s median; load + first look-up at every order (a format 1 "
              f"file would derive the hash-key arrays here) {t_ready:.3f} s median "
              f"{target(t_ready, '<', 1)}")

        # 4. batch scoring against a dict scorer of the same model
        held_ranks, held_len = zipf_corpus(n_tokens // 10, np.random.default_rng(SEED + 1))
        held = sentences_of(held_ranks, held_len)
        queries = [0]
        find = BackoffTables.find

        def counting_find(self: BackoffTables, k: int, q: np.ndarray) -> np.ndarray:
            queries[0] += len(q)
            return find(self, k, q)

        BackoffTables.find = counting_find  # type: ignore[method-assign]
        model.logprob(held)
        BackoffTables.find = find  # type: ignore[method-assign]
        n_queries = queries[0]
        t_score, fast = median_time(lambda: model.logprob(held), repeats)
        dict_score = dict_scorer(model.tables_)
        part = held[: max(1, len(held) // 10)]
        t_dscore, slow, how = baseline_time(lambda: dict_score(part))
        assert np.allclose(fast[: len(part)], slow, atol=1e-8), "dict scorer disagrees"
        held_tokens = sum(len(s) + 1 for s in held)
        part_tokens = sum(len(s) + 1 for s in part)
        lookups = n_queries / t_score
        ratio = (held_tokens / t_score) / (part_tokens / t_dscore)
        print(f"score {held_tokens:,} tokens: {t_score:.3f} s median, {n_queries:,} hash "
              f"look-ups = {lookups / 1e6:.1f} M look-ups/s {target(lookups / 1e6, '>=', 5)}, "
              f"{held_tokens / t_score / 1e6:.2f} M tokens/s; dict scorer on {part_tokens:,} "
              f"tokens {part_tokens / t_dscore / 1e6:.3f} M tokens/s ({how}); ratio "
              f"{ratio:.1f}x {target(ratio, '>=', 12)}")


if __name__ == "__main__":
    main()
