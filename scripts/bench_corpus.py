"""Building from text larger than the memory budget, and on a local Dask cluster.

The Zipfian text of scripts/bench_lm.py (50,000-word vocabulary, fixed seed) written to a
file, and 4-gram mkn models built from it through the command line, each in its own
process, whose peak resident memory is read from the kernel (wait4) when it ends:

1. the default build (half the available memory: the whole text is counted in memory) as
   the baseline; the same with ``--memory`` small enough to force several sorted runs, and
   the ratio of their times and peaks; the two model files must be byte-identical;
2. ``--cluster local`` (two worker processes on this two-core machine) against the same
   baseline: the overhead of the cluster, and the byte-identical file. A cluster pays off
   only when it has more cores than this machine; here it can only cost;
3. with ``--large``: 10 and 60 million words with ``--memory 4G``: time and peak of each
   and the ratio of the peaks (targets: 60 M under 5 GB and 15 minutes, ratio under 1.2);
   for each size also the same build with the model estimated in memory once counted (the
   estimation of before, in its own process: the same-run baseline of the estimation on
   disk), with the ratios of time and peak and a check that the two files are identical.
   This takes a long time and about 5 GB of disk (the text, the scratch folder, the model
   files) and, for the baseline, about 9 GB of memory; it is off by default
   (``--large-only``: this part alone; ``--large-words 20000000`` for a shorter check of
   the ratio);
4. with ``--stages``: the peak and time of each step of a ``--memory`` build, in its own
   process (the kernel's high-water mark reset as each step starts): counting, merging,
   finding contexts, smoothing each order, the index and the file, saving.

Times are medians of 3 runs (1 with ``--quick`` or ``--large``); peaks are the largest of
the runs. ``--quick`` uses 1 million words.

    PYTHONPATH=. python scripts/bench_corpus.py [--quick] [--large] [--stages]
"""

from __future__ import annotations

import argparse
import hashlib
import os
import statistics
import subprocess
import sys
import tempfile
import time
from pathlib import Path

import numpy as np
from bench_lm import SEED, VOCAB, target, zipf_corpus

from rescore.lm import load_model
from rescore.lm.external import parse_size

CLI = [sys.executable, "-c", "from rescore.cli import main; main()", "-q", "lm", "build"]


def write_text(path: Path, n_tokens: int) -> int:
    """The bench text, written in slices (its memory stays small); returns its bytes."""
    rng = np.random.default_rng(SEED)
    words = np.array([f"w{i}" for i in range(VOCAB)], dtype=object)
    done = 0
    with open(path, "w", encoding="ascii") as fh:
        while done < n_tokens:
            n = min(5_000_000, n_tokens - done)
            ranks, lengths = zipf_corpus(n, rng)
            ends = np.cumsum(lengths)
            lines = np.split(words[ranks], ends[:-1])
            fh.writelines(" ".join(line) + "\n" for line in lines)
            done += n
    return path.stat().st_size


def build(text: Path, out: Path, *extra: str, must: bool = True) -> tuple[float, float]:
    """Wall seconds and peak resident GB of one ``lm build`` process (a failed build is
    fatal when ``must``, else its figures are returned as they were when it ended)."""
    t0 = time.perf_counter()
    proc = subprocess.Popen([*CLI, str(text), "--order", "4", "-o", str(out), *extra])
    _, status, usage = os.wait4(proc.pid, 0)
    wall = time.perf_counter() - t0
    proc.returncode = os.waitstatus_to_exitcode(status)
    if proc.returncode != 0 and must:
        raise SystemExit(f"lm build {' '.join(extra)} failed with exit {proc.returncode}")
    if proc.returncode != 0:
        print(f"lm build {' '.join(extra)} failed with exit {proc.returncode}")
        return float("nan"), usage.ru_maxrss / 1e6
    return wall, usage.ru_maxrss / 1e6  # kilobytes on Linux


# Counting alone, in its own process, with the peak resident memory (VmHWM) read just before
# the runs are merged: the part that --memory bounds (reading, the vocabulary, counting the
# chunks, writing the runs; when the text fits in one chunk, the whole in-memory count); and
# at the end, with the merged count tables of the whole text
COUNT_ONLY = """
import sys
from rescore.lm import NGramModel, external, read_corpus
from rescore.process import avoid_huge_pages, keep_freed_memory
avoid_huge_pages()
keep_freed_memory()
def hwm():
    with open("/proc/self/status") as fh:
        return next(int(l.split()[1]) * 1024 for l in fh if l.startswith("VmHWM:"))
seen = {}
real = external.merge_all
def merge_all(*args, **kwargs):
    seen["before"] = hwm()
    return real(*args, **kwargs)
external.merge_all = merge_all
c = external.count_external(read_corpus(sys.argv[1]), 4, NGramModel(4)._choose_vocab,
                            closed_vocab=False, memory=int(sys.argv[2]), scratch=sys.argv[3])
print(seen.get("before", hwm()), hwm(), c.runs, sum(len(t) for t in c.tables))
"""


# The same build with the estimation of before (the whole model in memory once counted),
# in its own process, as the same-run baseline of the on-disk estimation: the library with
# the choice of the estimation turned off, then the file saved as lm build saves it
IN_MEMORY = """
import sys
from rescore.lm import NGramModel, read_corpus, save_model
from rescore.lm import model as model_module
from rescore.process import avoid_huge_pages, keep_freed_memory
avoid_huge_pages()
keep_freed_memory()
model_module.streams = lambda cutoffs, prune: False
m = NGramModel(4).fit(read_corpus(sys.argv[1]), memory=int(sys.argv[2]), scratch=sys.argv[3])
save_model(m, sys.argv[4])
"""


# The peak of each step of a build within a budget, in its own process: the kernel's
# high-water mark (VmHWM) is reset (clear_refs) as each step starts and read as it ends, so
# numpy's allocations are all seen; the process as the command line sets it up
STAGES = """
import sys, time
from rescore.lm import NGramModel, ondisk, read_corpus, save_model, store
from rescore.process import avoid_huge_pages, keep_freed_memory
avoid_huge_pages()
keep_freed_memory()
def hwm():
    with open("/proc/self/status") as fh:
        return next(int(l.split()[1]) << 10 for l in fh if l.startswith("VmHWM:"))
def reset():
    with open("/proc/self/clear_refs", "w") as fh:
        fh.write("5")
def wrap(module, name, label):
    real = getattr(module, name)
    def step(*args, **kwargs):
        reset()
        t = time.perf_counter()
        out = real(*args, **kwargs)
        print(f"  {label.format(*args)}: peak {hwm() / 1e9:.2f} GB, "
              f"{time.perf_counter() - t:.1f} s",
              flush=True)
        return out
    setattr(module, name, step)
wrap(ondisk, "count_chunks", "counting (the first pass and the chunks)")
wrap(ondisk, "_shelve", "the count tables to the scratch folder (merging the runs)")
wrap(ondisk, "_contexts", "finding the contexts")
wrap(ondisk, "_smooth", "smoothing order {2}")
wrap(ondisk, "_write_model", "the index, the values in its order, the file and its mapping")
wrap(store, "save", "saving the model (lm build's save)")
m = NGramModel(4).fit(read_corpus(sys.argv[1]), memory=int(sys.argv[2]), scratch=sys.argv[3])
save_model(m, sys.argv[4])
"""


def stages(text: Path, memory: int, scratch: Path, out: Path) -> None:
    """Print the peak and time of each step of one build (see STAGES)."""
    subprocess.run([sys.executable, "-c", STAGES, str(text), str(memory), str(scratch),
                    str(out)], check=True)


def in_memory_build(text: Path, memory: int, scratch: Path, out: Path) -> tuple[float, float]:
    """Wall seconds and peak resident GB of the baseline build (see IN_MEMORY)."""
    t0 = time.perf_counter()
    proc = subprocess.Popen([sys.executable, "-c", IN_MEMORY, str(text), str(memory),
                             str(scratch), str(out)])
    _, status, usage = os.wait4(proc.pid, 0)
    if os.waitstatus_to_exitcode(status) != 0:
        raise SystemExit("the baseline build (estimation in memory) failed")
    return time.perf_counter() - t0, usage.ru_maxrss / 1e6


def count_only(text: Path, memory: int, scratch: Path) -> tuple[float, float, float, int]:
    """Seconds, GB before the merge, GB at the end, and runs of counting alone."""
    t0 = time.perf_counter()
    out = subprocess.run([sys.executable, "-c", COUNT_ONLY, str(text), str(memory),
                          str(scratch)], capture_output=True, text=True, check=True).stdout
    before, end, runs, _ = (int(x) for x in out.split())
    return time.perf_counter() - t0, before / 1e9, end / 1e9, runs


def measure(text: Path, out: Path, repeats: int, *extra: str) -> tuple[float, float, str]:
    runs = [build(text, out, *extra) for _ in range(repeats)]
    digest = hashlib.sha256(out.read_bytes()).hexdigest()
    return statistics.median(r[0] for r in runs), max(r[1] for r in runs), digest


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__)
    ap.add_argument("--quick", action="store_true", help="1 million words, one run each")
    ap.add_argument("--large", action="store_true",
                    help="also 10 and 60 million words with --memory 4G (long)")
    ap.add_argument("--large-words", type=int, default=60_000_000, metavar="N",
                    help="with --large: the larger text's words (default 60 million)")
    ap.add_argument("--stages", action="store_true",
                    help="the peak of each step of a --memory build (1G on 10 million words;"
                         " with --large also 4G on the larger text)")
    ap.add_argument("--large-only", action="store_true",
                    help="only the --large part (the peaks of the two sizes and their ratio)")
    args = ap.parse_args()
    repeats = 1 if args.quick else 3
    n_tokens = 1_000_000 if args.quick else 10_000_000
    small = "64M" if args.quick else "1G"
    with tempfile.TemporaryDirectory() as tmp_name:
        tmp = Path(tmp_name)
        scratch = tmp / "scratch"
        scratch.mkdir()
        text = tmp / "corpus.txt"
        if not args.large_only:
            size = write_text(text, n_tokens)
            print(f"text: {n_tokens:,} words, {size / 1e6:.0f} MB; 4-gram mkn; "
                  f"times: median of {repeats}")
        if args.quick:
            print("--quick: small sizes; the targets are set for the full runs, so 'met' "
                  "here is only indicative")

        if not args.large_only:
            base_t, base_peak, base_digest = measure(text, tmp / "base.lm", repeats)
            grams = sum(load_model(tmp / "base.lm").n_ngrams_)
            print(f"default build (counted in memory): {base_t:.1f} s, peak {base_peak:.2f} GB; "
                  f"{grams / 1e6:.1f} M n-grams, {base_peak * 1e9 / grams:.0f} bytes of peak per "
                  "n-gram")

            runs_t, runs_peak, runs_digest = measure(text, tmp / "runs.lm", repeats, "--memory",
                                                     small, "--scratch", str(scratch))
            assert runs_digest == base_digest, "sorted runs gave another model file"
            print(f"--memory {small} (several sorted runs): {runs_t:.1f} s, peak "
                  f"{runs_peak:.2f} GB; time ratio {runs_t / base_t:.2f}x, peak ratio "
                  f"{runs_peak / base_peak:.2f}x; model file byte-identical")

            if args.stages:
                print(f"--memory {small}, step by step (VmHWM reset as each step starts):")
                stages(text, parse_size(small), scratch, tmp / "stages.lm")

            try:
                import distributed  # noqa: F401
            except ImportError:
                print("--cluster local: skipped (dask.distributed is not installed)")
            else:
                cl_t, cl_peak, cl_digest = measure(text, tmp / "cluster.lm", repeats,
                                                   "--cluster", "local", "--workers", "2")
                assert cl_digest == base_digest, "the cluster gave another model file"
                print(f"--cluster local, 2 workers: {cl_t:.1f} s (start-up of the cluster "
                      f"included), largest process {cl_peak:.2f} GB; overhead against the "
                      f"default build {cl_t / base_t:.2f}x on this 2-core machine; model file "
                      f"byte-identical")

        if args.large or args.large_only:
            peaks, counting = {}, {}
            large = args.large_words
            for words in (10_000_000, large):
                big = tmp / f"corpus{words // 1_000_000}M.txt"
                big_size = write_text(big, words)
                c_t, c_before, c_end, c_runs = count_only(big, 4 << 30, scratch)
                counting[words] = c_before
                print(f"{words / 1e6:g} M words, counting alone with a 4 GiB budget: "
                      f"{c_t / 60:.1f} min, {c_runs} sorted runs (0: in memory), peak "
                      f"{c_before:.2f} GB before the merge, {c_end:.2f} GB with the merged "
                      "count tables", flush=True)
                if args.stages:
                    print(f"{words / 1e6:g} M words, --memory 4G, step by step:")
                    stages(big, 4 << 30, scratch, tmp / "stages.lm")
                wall, peak = build(big, tmp / "large.lm", "--memory", "4G",
                                   "--scratch", str(scratch), must=False)
                peaks[words] = peak
                base_wall, base_peak = in_memory_build(big, 4 << 30, scratch, tmp / "base.lm")
                line = (f"{words / 1e6:g} M words ({big_size / 1e9:.2f} GB of text), "
                        f"--memory 4G: {wall / 60:.1f} min, one run, peak {peak:.2f} GB")
                if words == large:
                    line += (f" {target(peak, '<', 5)}; time {target(wall / 60, '<', 15)} "
                             "(minutes)")
                if wall == wall:  # not NaN: the build finished
                    grams = sum(load_model(tmp / "large.lm").n_ngrams_)
                    line += (f"; {grams / 1e6:.1f} M n-grams, {peak * 1e9 / grams:.0f} bytes "
                             "of peak per n-gram")
                print(line, flush=True)
                same = wall == wall and (tmp / "base.lm").read_bytes() == (
                    tmp / "large.lm").read_bytes()
                print(f"  the same build with the model estimated in memory once counted (the "
                      f"baseline): {base_wall / 60:.1f} min, peak {base_peak:.2f} GB; the "
                      f"estimation on disk against it: time {wall / base_wall:.2f}x, peak "
                      f"{peak / base_peak:.2f}x; model files "
                      f"{'byte-identical' if same else 'DIFFERENT'}", flush=True)
                (tmp / "base.lm").unlink()
                big.unlink()
            ratio = peaks[large] / peaks[10_000_000]
            print(f"whole build, peak {large / 1e6:g} M / peak 10 M: {ratio:.2f} "
                  f"{target(ratio, '<', 1.2)}")
            ratio = counting[large] / counting[10_000_000]
            print(f"counting before the merge, peak {large / 1e6:g} M / peak 10 M: "
                  f"{ratio:.2f} {target(ratio, '<', 1.2)}")


if __name__ == "__main__":
    main()
