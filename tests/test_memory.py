"""Streaming: peak memory of `apply` and `wer` does not grow with the number of utterances;
`lm build` within a budget holds less than its model estimated in memory."""

from __future__ import annotations

import subprocess
import sys
from pathlib import Path

import numpy as np

from tests.bulk import write_bulk, write_weights

# Started from a small launcher, not from pytest: on Linux a child's ru_maxrss begins at
# the high-water mark of the image it was forked from (the kernel carries it across exec),
# so a child of a pytest process that has grown to 400 MB reports at least 400 MB whatever
# it does. The launcher is a bare interpreter of a few MB; its child reports its own peak.
_LAUNCH = """
import os, sys
pid = os.fork()
if pid == 0:
    sink = os.open(os.devnull, os.O_WRONLY)
    os.dup2(sink, 1)
    os.dup2(sink, 2)
    os.execv(sys.argv[1], sys.argv[1:])
_, status, usage = os.wait4(pid, 0)
print(os.waitstatus_to_exitcode(status), usage.ru_maxrss)
"""


# What the whole-file id check may add per utterance: 16 bytes kept (digest and line), and
# at the end the sort that finds duplicates, about 40 more for a moment (the joined copy,
# the order, the sorted digests and lines); measured 27 to 64 in all, over 90,000
# utterances, with a few MB of noise in any peak. Holding every id string in the main
# process took about 85.
ID_CHECK_BYTES = 80


def _peak_rss_kib(args: list[str]) -> int:
    # ru_maxrss of that one child, in KiB on Linux (getrusage(2) man page)
    out = subprocess.run([sys.executable, "-S", "-c", _LAUNCH, *args], capture_output=True,
                         text=True, check=True, timeout=600).stdout.split()
    assert out[0] == "0", out
    return int(out[1])


def _peaks(tmp_path: Path, command: list[str]) -> dict[int, int]:
    peaks = {}
    for n in (10_000, 100_000):
        src = tmp_path / f"n{n}.jsonl"
        write_bulk(src, n, depth=5)
        peaks[n] = _peak_rss_kib([sys.executable, "-m", "rescore", command[0], str(src),
                                  *command[1:]])
        src.unlink()
    return peaks


def test_apply_peak_memory_flat_from_10k_to_100k(tmp_path: Path) -> None:
    weights = tmp_path / "w.json"
    write_weights(weights)
    # --no-wer: the streaming of apply itself (the WER table read back after it keeps two
    # small counts per utterance for its intervals; README, large jobs)
    peaks = _peaks(tmp_path, ["apply", "--weights", str(weights), "--no-wer",
                              "-o", str(tmp_path / "out.jsonl")])
    # the project's streaming target (README, large jobs): less than 20 % apart although the
    # input is ten times larger
    assert peaks[100_000] < 1.2 * peaks[10_000], peaks
    # and no more than the id check's own share (ID_CHECK_BYTES an utterance)
    assert (peaks[100_000] - peaks[10_000]) * 1024 < ID_CHECK_BYTES * 90_000, peaks


def test_wer_peak_memory_flat_from_10k_to_100k(tmp_path: Path) -> None:
    peaks = _peaks(tmp_path, ["wer", "--json"])
    # the project's streaming target (README, large jobs): less than 20 % apart although the
    # input is ten times larger
    assert peaks[100_000] < 1.2 * peaks[10_000], peaks
    # and no more than the id check's own share (ID_CHECK_BYTES an utterance)
    assert (peaks[100_000] - peaks[10_000]) * 1024 < ID_CHECK_BYTES * 90_000, peaks


def test_parallel_apply_peak_memory_flat_from_10k_to_100k(tmp_path: Path) -> None:
    # the main process keeps 16 bytes per utterance for the whole-file id check, not the
    # records' ids as strings; each worker holds one batch of its shard at a time
    weights = tmp_path / "w.json"
    write_weights(weights)
    # batches of 500: the 8 shards of 10,000 utterances (1,250 each) fill whole batches as
    # those of 100,000 do, so a worker's batch is the same size in both runs
    peaks = _peaks(tmp_path, ["apply", "--weights", str(weights), "--workers", "2",
                              "--no-wer", "--batch-size", "500",
                              "-o", str(tmp_path / "out.jsonl")])
    # the project's streaming target (README, large jobs): less than 20 % apart although the
    # input is ten times larger
    assert peaks[100_000] < 1.2 * peaks[10_000], peaks
    # and no more than the id check's own share (ID_CHECK_BYTES an utterance)
    assert (peaks[100_000] - peaks[10_000]) * 1024 < ID_CHECK_BYTES * 90_000, peaks


# The same build with the estimation in memory once counted, in its own process (the
# library with the choice of the on-disk estimation turned off)
IN_MEMORY_BUILD = """
import sys
from rescore.lm import NGramModel, read_corpus, save_model
from rescore.lm import model as model_module
model_module.streams = lambda cutoffs, prune: False
m = NGramModel(4).fit(read_corpus(sys.argv[1]), memory=64 << 20, scratch=sys.argv[2])
save_model(m, sys.argv[3])
"""


def test_lm_build_within_a_budget_holds_less_than_the_model_in_memory(tmp_path: Path) -> None:
    # a Zipfian text of 1.5 million words over 20,000 (word frequencies fall as a power of
    # their rank: Zipf's law, common practice for synthetic text)
    rng = np.random.default_rng(3)
    ranks = rng.zipf(1.2, 1_500_000) % 20_000
    lines = np.split(ranks, np.arange(12, len(ranks), 12))
    text = tmp_path / "t.txt"
    text.write_text("".join(" ".join(f"w{r}" for r in line) + "\n" for line in lines))
    scratch = tmp_path / "scratch"
    scratch.mkdir()
    disk = _peak_rss_kib([sys.executable, "-m", "rescore", "lm", "build", str(text), "-n", "4",
                          "-o", str(tmp_path / "disk.lm"), "--memory", "64M",
                          "--scratch", str(scratch)])
    memory = _peak_rss_kib([sys.executable, "-c", IN_MEMORY_BUILD, str(text), str(scratch),
                            str(tmp_path / "memory.lm")])
    assert (tmp_path / "disk.lm").read_bytes() == (tmp_path / "memory.lm").read_bytes()
    # our own aim (README, Memory): the orders on disk, a fraction of the model's memory;
    # measured 0.62 to 0.64 of it at this size (235 against 375 MB, the interpreter and
    # numpy included)
    assert disk < 0.8 * memory, (disk, memory)
    assert list(scratch.iterdir()) == []
