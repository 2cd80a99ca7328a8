"""Progress bars: shown on a terminal, silent otherwise, never in the way of the output."""

from __future__ import annotations

import os
import pty
import subprocess
import sys
from pathlib import Path

from tests.bulk import write_bulk, write_weights


def _run_on_terminal(args: list[str]) -> tuple[int, str]:
    leader, follower = pty.openpty()
    proc = subprocess.Popen(args, stdin=subprocess.DEVNULL, stdout=follower, stderr=follower)
    os.close(follower)
    chunks = []
    while True:
        try:
            data = os.read(leader, 65536)
        except OSError:  # the terminal closes when the child exits (Linux gives EIO)
            break
        if not data:
            break
        chunks.append(data)
    os.close(leader)
    return proc.wait(timeout=60), b"".join(chunks).decode("utf-8", "replace")


def test_apply_shows_progress_on_a_terminal(tmp_path: Path) -> None:
    src, weights = tmp_path / "in.jsonl", tmp_path / "w.json"
    write_bulk(src, 3000)
    write_weights(weights)
    cmd = [sys.executable, "-m", "rescore", "apply", str(src), "--weights", str(weights),
           "-o", str(tmp_path / "out.jsonl"), "--batch-size", "100"]
    code, screen = _run_on_terminal(cmd)
    assert code == 0, screen
    assert "rescoring" in screen and "3000/3000" in screen
    code, screen = _run_on_terminal([*cmd[:3], "--quiet", *cmd[3:]])
    assert code == 0 and "rescoring" not in screen
    piped = subprocess.run(cmd, capture_output=True, text=True, timeout=60)
    assert piped.returncode == 0 and "━" not in piped.stderr and "/3000" not in piped.stderr
    assert piped.stdout == ""
