"""Progress bars: shown on a terminal, silent otherwise, never in the way of the output."""

from __future__ import annotations

import os
import pty
import re
import subprocess
import sys
from pathlib import Path

from tests.bulk import write_bulk, write_weights

DEMO = Path(__file__).resolve().parent.parent / "fixtures" / "demo"
RESCORE = [sys.executable, "-m", "rescore"]


def _run_on_terminal(args: list[str]) -> tuple[int, str]:
    leader, follower = pty.openpty()
    env = dict(os.environ, COLUMNS="200")  # wide enough that no description is cut short
    proc = subprocess.Popen(args, stdin=subprocess.DEVNULL, stdout=follower, stderr=follower,
                            env=env)
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
    # stdout holds the result alone (the bulk records carry references: the WER table)
    assert "WER before and after" in piped.stdout and "/3000" not in piped.stdout


def _plain(screen: str) -> str:
    """The terminal output without colour codes and bar glyphs, one line per redraw."""
    text = re.sub(r"\x1b\[[0-9;?]*[A-Za-z]", "", screen).replace("\r", "\n")
    return re.sub("[━╸╺]+", " ", text)


def _shown(screen: str, stage: str, total: int, *, rate: bool = True) -> bool:
    """The bar reached ``total`` of ``total`` in ``stage``, with a rate (which needs two
    updates) and the elapsed and remaining times beside it."""
    speed = r" +[\d,]+/s" if rate else r" +(?:[\d,]+/s)?"
    pattern = (re.escape(stage) + rf" +{total}/{total} +100%{speed} +\d+:\d\d:\d\d "
               r"+\d+:\d\d:\d\d")
    return re.search(pattern, _plain(screen)) is not None


def _silent_otherwise(cmd: list[str], marker: str) -> None:
    """With --quiet on a terminal, or with stdout piped, no bar is drawn."""
    code, screen = _run_on_terminal([*cmd[:3], "--quiet", *cmd[3:]])
    assert code == 0 and marker not in screen, screen
    piped = subprocess.run(cmd, capture_output=True, text=True, timeout=300)
    assert piped.returncode == 0, piped.stderr
    assert "━" not in piped.stderr and marker not in piped.stderr


def test_lm_build_shows_each_stage_with_a_total(tmp_path: Path) -> None:
    cmd = [*RESCORE, "lm", "build", str(DEMO / "train.txt"), "-o", str(tmp_path / "m.lm")]
    code, screen = _run_on_terminal(cmd)
    assert code == 0, screen
    lines = (DEMO / "train.txt").read_bytes().count(b"\n")
    assert _shown(screen, "lm build (1 file): reading text", lines), _plain(screen)
    assert _shown(screen, "counting n-grams", 3)  # one unit per order
    assert _shown(screen, "smoothing", 4)  # contexts, then one unit per order
    assert _shown(screen, "indexing", 3)
    _silent_otherwise(cmd, "counting n-grams")


def test_tune_shows_scoring_and_tuning_with_totals(tmp_path: Path) -> None:
    model = tmp_path / "m.lm"
    subprocess.run([*RESCORE, "-q", "lm", "build", str(DEMO / "train.txt"), "-o", str(model)],
                   check=True)
    cmd = [*RESCORE, "tune", str(DEMO / "dev.jsonl"), "--lm", str(model), "-o",
           str(tmp_path / "w.json"), "--feature", "first_pass_lm", "--folds", "2",
           "--grid-lm", "0:20:41"]
    code, screen = _run_on_terminal(cmd)
    assert code == 0, screen
    # 500 utterances are one batch: a single update, so no rate yet
    assert _shown(screen, "scoring the dev set", 500, rate=False), _plain(screen)
    # exact search: 41 grid rows, 41 row starts, 41 units over its runs; the search and
    # each of the 2 folds: 3 * 123
    assert _shown(screen, "tuning", 3 * 3 * 41), _plain(screen)
    _silent_otherwise(cmd, "tuning")


def test_report_shows_the_bootstrap_with_a_total(tmp_path: Path) -> None:
    cmd = [*RESCORE, "report", "--before", str(DEMO / "test.jsonl"), "--after",
           str(DEMO / "test.jsonl"), "-o", str(tmp_path / "rep"), "--resamples", "20000"]
    code, screen = _run_on_terminal(cmd)
    assert code == 0, screen
    assert _shown(screen, "bootstrap resamples", 20000), _plain(screen)
    _silent_otherwise(cmd, "bootstrap")
