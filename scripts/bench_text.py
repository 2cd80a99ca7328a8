"""Text to ids: whole-process `lm perplexity` against a plain dict back-off loop, same run.

A trigram built from 3 million Zipfian words (fixed seed) is saved as a native file and
exported as ARPA; a held-out text of 3 million words (about 3.26 million scored tokens) is
scored (1) by the whole `rescore lm perplexity MODEL TEXT` process, start-up, model loading,
reading and normalising the text included, and (2) by a plain Python loop of dict look-ups
with back-off over the ARPA model's n-grams, on the text already split into words (the loop
alone: its reading, splitting and model loading are not timed). Prints medians and their
ratio (target: the process at least 5x the loop's token rate), then where the process's
time goes, stage by stage, in this process. ``--quick`` trains on and scores 300,000
words (start-up then weighs far more: the ratio is only indicative).

    PYTHONPATH=. python scripts/bench_text.py [--quick]
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
from collections.abc import Callable, Sequence
from pathlib import Path
from typing import Any

import numpy as np
from bench_lm import sentences_of, target, zipf_corpus
from benchkit import like_the_command_line

from rescore.lm import NGramModel, load_model, perplexity, read_corpus, save_model
from rescore.lm.vocab import encode_block, stream_from_lengths
from rescore.readers import iter_text_blocks
from rescore.text import normalise_block

SEED = 20240611
ORDER = 3


def arpa_dicts(path: Path) -> tuple[dict[tuple[str, ...], float], dict[tuple[str, ...], float]]:
    """log10 probabilities and back-off weights of every n-gram of an ARPA file."""
    logp: dict[tuple[str, ...], float] = {}
    bow: dict[tuple[str, ...], float] = {}
    order = 0
    with open(path, encoding="utf-8") as fh:
        for line in fh:
            line = line.strip()
            if line.startswith("\\") and line.endswith("-grams:"):
                order = int(line[1:line.index("-")])
                continue
            if not order or not line or line.startswith("\\"):
                continue
            parts = line.split()
            gram = tuple(parts[1:1 + order])
            logp[gram] = float(parts[0])
            if len(parts) > 1 + order:
                bow[gram] = float(parts[1 + order])
    return logp, bow


def dict_loop(logp: dict[tuple[str, ...], float], bow: dict[tuple[str, ...], float],
              order: int) -> Callable[[Sequence[Sequence[str]]], float]:
    """The plain back-off rule, one dict probe at a time: log10 P of all sentences."""
    known = {g[0] for g in logp if len(g) == 1}

    def score(sents: Sequence[Sequence[str]]) -> float:
        total = 0.0
        for s in sents:
            p = ["<s>", *(w if w in known else "<unk>" for w in s), "</s>"]
            for i in range(1, len(p)):
                g = tuple(p[max(0, i - order + 1):i + 1])
                extra = 0.0
                while g not in logp:
                    extra += bow.get(g[:-1], 0.0)
                    g = g[1:]
                total += logp[g] + extra
        return total

    return score


def median_of(fn: Callable[[], Any], runs: int) -> tuple[float, Any]:
    times, out = [], None
    for _ in range(runs):
        t = time.perf_counter()
        out = fn()
        times.append(time.perf_counter() - t)
    return statistics.median(times), out


def stages(model_path: Path, text: Path) -> list[tuple[str, float]]:
    """Seconds of each stage of `lm perplexity` on ``text``, run one after another here."""
    out: list[tuple[str, float]] = []
    t = time.perf_counter()
    subprocess.run([sys.executable, "-c", "import rescore.cli"], check=True, cwd=text.parent,
                   env={**os.environ, "PYTHONPATH": str(Path(__file__).resolve().parent.parent)})
    out.append(("interpreter start and imports (a separate process)", time.perf_counter() - t))
    t = time.perf_counter()
    model = load_model(model_path)
    model.vocab_.packed  # noqa: B018 - the packed look-up, built once per model
    out.append(("load the model", time.perf_counter() - t))
    t = time.perf_counter()
    blocks = list(iter_text_blocks(text))
    out.append(("read and check blocks of lines", time.perf_counter() - t))
    t = time.perf_counter()
    clean = [normalise_block(data) for _, data in blocks]
    out.append(("normalise", time.perf_counter() - t))
    t = time.perf_counter()
    encoded = [encode_block(model.vocab_, c) for c in clean]
    out.append(("words to ids", time.perf_counter() - t))
    t = time.perf_counter()
    streams = [stream_from_lengths(ids, counts[counts > 0]) for ids, counts in encoded]
    out.append(("sentence marks (stream)", time.perf_counter() - t))
    t = time.perf_counter()
    for s in streams:
        model.stream_logprob(s)
    out.append(("n-gram look-ups and back-off (scoring)", time.perf_counter() - t))
    t = time.perf_counter()
    perplexity(model, read_corpus(text))
    out.append(("all of perplexity() from the file, for comparison", time.perf_counter() - t))
    return out


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__)
    ap.add_argument("--quick", action="store_true", help="300,000 words, well under a minute")
    ap.add_argument("--against", type=Path, metavar="DIR",
                    help="also time the process with the package of another checkout (a "
                         "before / after in the same run)")
    args = ap.parse_args()
    like_the_command_line()
    n_words = 300_000 if args.quick else 3_000_000
    runs = 5
    with tempfile.TemporaryDirectory() as tmp:
        tmpdir = Path(tmp)
        train_r, train_l = zipf_corpus(n_words, np.random.default_rng(SEED))
        model = NGramModel(ORDER, "mkn").fit(sentences_of(train_r, train_l))
        native, arpa = tmpdir / "m.lm", tmpdir / "m.arpa"
        save_model(model, native)
        save_model(model, arpa)
        held_r, held_l = zipf_corpus(n_words, np.random.default_rng(SEED + 1))
        held = sentences_of(held_r, held_l)
        text = tmpdir / "held.txt"
        with open(text, "w", encoding="utf-8") as fh:
            fh.writelines(" ".join(s) + "\n" for s in held)
        n_tokens = sum(len(s) + 1 for s in held)
        print(f"trigram mkn from {n_words:,} words ({sum(model.n_ngrams_):,} n-grams); "
              f"held-out text {n_words:,} words, {n_tokens:,} scored tokens")

        cmd = [sys.executable, "-m", "rescore", "-q", "lm", "perplexity", "--json",
               str(native), str(text)]
        env = {**os.environ, "PYTHONPATH": str(Path(__file__).resolve().parent.parent)}

        def process(code: dict[str, str] = env) -> dict[str, Any]:
            # run from the scratch folder: `python -m` puts the working folder first on
            # the path, ahead of PYTHONPATH
            done = subprocess.run(cmd, check=True, capture_output=True, text=True, env=code,
                                  cwd=tmpdir)
            result: dict[str, Any] = json.loads(done.stdout)
            return result

        other = None if args.against is None else \
            {**os.environ, "PYTHONPATH": str(args.against.resolve())}

        logp, bow = arpa_dicts(arpa)
        loop = dict_loop(logp, bow, ORDER)
        # interleaved, so that a burst of load from another job falls on both alike
        t_proc: list[float] = []
        t_loop: list[float] = []
        t_other: list[float] = []
        got: dict[str, Any] = {}
        slow = 0.0
        for _ in range(runs):
            t, got = median_of(process, 1)
            t_proc.append(t)
            t, slow = median_of(lambda: loop(held), 1)
            t_loop.append(t)
            if other is not None:
                t, theirs = median_of(lambda: process(other), 1)
                assert theirs == got, "the other checkout's figures differ"
                t_other.append(t)
        assert abs(got["log10_prob"] - slow) <= 1e-6 * abs(slow), "dict loop disagrees"
        assert got["tokens"] == n_tokens
        proc, base = statistics.median(t_proc), statistics.median(t_loop)
        ratio = base / proc
        print(f"whole `lm perplexity` process: {proc:.2f} s median of {runs} = "
              f"{n_tokens / proc / 1e6:.2f} M tokens/s")
        print(f"plain dict back-off loop (the loop alone): {base:.2f} s median of {runs} = "
              f"{n_tokens / base / 1e6:.2f} M tokens/s")
        print(f"ratio (process / loop, token rates): {ratio:.1f}x {target(ratio, '>=', 5)}")
        if t_other:
            theirs_t = statistics.median(t_other)
            print(f"the process with {args.against}: {theirs_t:.2f} s median of {runs}, "
                  f"ratio to the loop {base / theirs_t:.1f}x (same figures printed)")
        print("stages of `lm perplexity`, one run each:")
        for name, seconds in stages(native, text):
            print(f"  {name:52s} {seconds:6.3f} s")


if __name__ == "__main__":
    main()
