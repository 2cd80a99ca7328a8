"""Streaming: peak memory of `apply` and `wer` does not grow with the number of utterances."""

from __future__ import annotations

import os
import subprocess
import sys
from pathlib import Path

from tests.bulk import write_bulk, write_weights


def _peak_rss_kib(args: list[str]) -> int:
    # ru_maxrss of that one child, in KiB on Linux (getrusage(2) man page)
    with open(os.devnull, "wb") as sink:
        proc = subprocess.Popen(args, stdout=sink, stderr=sink)
        _, status, usage = os.wait4(proc.pid, 0)
    proc.returncode = os.waitstatus_to_exitcode(status)
    assert proc.returncode == 0
    return int(usage.ru_maxrss)


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
    peaks = _peaks(tmp_path, ["apply", "--weights", str(weights),
                              "-o", str(tmp_path / "out.jsonl")])
    # the project's streaming target (README, large jobs): less than 20 % apart although the
    # input is ten times larger
    assert peaks[100_000] < 1.2 * peaks[10_000], peaks
    # and no more than the id check's own share: 16 bytes an utterance plus the sort that
    # finds duplicates (holding every id string in the main process took about 85)
    assert (peaks[100_000] - peaks[10_000]) * 1024 < 45 * 90_000, peaks


def test_wer_peak_memory_flat_from_10k_to_100k(tmp_path: Path) -> None:
    peaks = _peaks(tmp_path, ["wer", "--json"])
    # the project's streaming target (README, large jobs): less than 20 % apart although the
    # input is ten times larger
    assert peaks[100_000] < 1.2 * peaks[10_000], peaks
    # and no more than the id check's own share: 16 bytes an utterance plus the sort that
    # finds duplicates (holding every id string in the main process took about 85)
    assert (peaks[100_000] - peaks[10_000]) * 1024 < 45 * 90_000, peaks


def test_parallel_apply_peak_memory_flat_from_10k_to_100k(tmp_path: Path) -> None:
    # the main process keeps 16 bytes per utterance for the whole-file id check, not the
    # records' ids as strings; each worker holds one batch of its shard at a time
    weights = tmp_path / "w.json"
    write_weights(weights)
    peaks = _peaks(tmp_path, ["apply", "--weights", str(weights), "--workers", "2",
                              "-o", str(tmp_path / "out.jsonl")])
    # the project's streaming target (README, large jobs): less than 20 % apart although the
    # input is ten times larger
    assert peaks[100_000] < 1.2 * peaks[10_000], peaks
    # and no more than the id check's own share: 16 bytes an utterance plus the sort that
    # finds duplicates (holding every id string in the main process took about 85)
    assert (peaks[100_000] - peaks[10_000]) * 1024 < 45 * 90_000, peaks
