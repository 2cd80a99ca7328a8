"""Interrupted and killed runs: no output file, no stray temporary, nothing half-written."""

from __future__ import annotations

import os
import signal
import subprocess
import sys
import time
from pathlib import Path

import pytest

from rescore.leftovers import TMP_PREFIX
from tests.bulk import write_bulk, write_long_run


@pytest.fixture(scope="module")
def big(tmp_path_factory: pytest.TempPathFactory) -> tuple[Path, Path]:
    return write_long_run(tmp_path_factory.mktemp("big"))


def _start(src: Path, weights: Path, out: Path) -> subprocess.Popen[bytes]:
    return subprocess.Popen([sys.executable, "-m", "rescore", "apply", str(src), "--weights",
                             str(weights), "-o", str(out), "--text", str(out) + ".tsv"],
                            stdout=subprocess.PIPE, stderr=subprocess.PIPE)


def _wait_for_temporary(folder: Path, proc: subprocess.Popen[bytes]) -> None:
    deadline = time.monotonic() + 60
    while time.monotonic() < deadline and proc.poll() is None:
        if any(p.name.startswith(TMP_PREFIX) for p in folder.iterdir()):
            time.sleep(0.3)  # well into the run: output is being written
            return
        time.sleep(0.05)
    pytest.fail("apply finished or stalled before writing began; enlarge the input")


@pytest.mark.parametrize("sig", [signal.SIGINT, signal.SIGTERM], ids=["SIGINT", "SIGTERM"])
def test_signal_mid_run_leaves_nothing(big: tuple[Path, Path], tmp_path: Path,
                                       sig: signal.Signals) -> None:
    out = tmp_path / "out.jsonl"
    proc = _start(*big, out)
    _wait_for_temporary(tmp_path, proc)
    proc.send_signal(sig)
    _, err = proc.communicate(timeout=60)
    # the shell convention for death by signal n is 128 + n (bash manual, "EXIT STATUS")
    assert proc.returncode == 128 + sig
    assert err.decode().strip().splitlines()[-1].startswith("error: ")
    assert b"Traceback" not in err
    assert list(tmp_path.iterdir()) == []


def test_sigkill_leaves_only_a_temporary_that_the_next_run_removes(
        big: tuple[Path, Path], tmp_path: Path) -> None:
    out = tmp_path / "out.jsonl"
    proc = _start(*big, out)
    _wait_for_temporary(tmp_path, proc)
    os.kill(proc.pid, signal.SIGKILL)
    proc.communicate(timeout=30)
    left = list(tmp_path.iterdir())
    assert left and all(p.name.startswith(TMP_PREFIX) for p in left)
    assert not out.exists()
    # the next run to write the same output cleans what the killed one left
    small = tmp_path.parent / "small.jsonl"
    write_bulk(small, 10)
    done = subprocess.run([sys.executable, "-m", "rescore", "apply", str(small), "--weights",
                           str(big[1]), "-o", str(out), "--text", str(out) + ".tsv"],
                          capture_output=True, timeout=60)
    assert done.returncode == 0, done.stderr
    assert sorted(p.name for p in tmp_path.iterdir()) == ["out.jsonl", "out.jsonl.tsv"]
