"""What a command may do to the paths it writes, through the command line: special files
are written to, never replaced; the outputs of one command are checked before the work and
appear as a set; overflowing scores, markup in names and hostile records are refused or
shown as they are.

Expected behaviour is the project's contract (README "Guarantees" and "Reliability"):
``error: PATH[:LINE][: FIELD]: what is wrong``, exit 1, and no output written.
"""

from __future__ import annotations

import json
import os
import stat
import subprocess
import sys
from pathlib import Path

import pytest

from tests.conftest import FIXTURES, ROOT, run

DEMO = FIXTURES / "demo"


def _cli(args: list[str | os.PathLike[str]], **kw: object) -> subprocess.CompletedProcess[str]:
    return subprocess.run([sys.executable, "-m", "rescore", "-q", *map(str, args)],
                          capture_output=True, text=True, timeout=300, cwd=ROOT,
                          env={**os.environ, "PYTHONPATH": str(ROOT)}, **kw)  # type: ignore[call-overload]


@pytest.fixture(scope="module")
def model(tmp_path_factory: pytest.TempPathFactory) -> dict[str, Path]:
    folder = tmp_path_factory.mktemp("model")
    lm = folder / "logbook.lm"
    assert run(["lm", "build", DEMO / "train.txt", "--order", "3", "-o", lm]).exit_code == 0
    weights = folder / "w.json"
    weights.write_text('{"acoustic_scale": 1.0, "lm_weight": 5.0, "insertion_penalty": 0.0, '
                       '"features": {}}')
    return {"lm": lm, "weights": weights}


def _apply(model: dict[str, Path], out: Path | str, *extra: str | Path
           ) -> subprocess.CompletedProcess[str]:
    return _cli(["apply", DEMO / "test.jsonl", "--lm", model["lm"], "--weights",
                 model["weights"], "-o", out, *extra])


# --- 1: special files ------------------------------------------------------------------

@pytest.mark.skipif(os.geteuid() != 0, reason="making a device node (os.mknod) needs root")
@pytest.mark.parametrize("workers", ["1", "2"])
def test_device_node_named_as_output_is_written_to_not_replaced(
        model: dict[str, Path], tmp_path: Path, workers: str) -> None:
    node = tmp_path / "null"
    os.mknod(node, 0o666 | stat.S_IFCHR, os.makedev(1, 3))  # 1,3 is /dev/null on Linux
    link = tmp_path / "link-to-null"
    link.symlink_to(node)
    for target in (node, link):
        res = _apply(model, target, "--workers", workers, "--shard-mb", "0.01")
        assert res.returncode == 0, res.stderr
        assert stat.S_ISCHR(node.stat().st_mode)  # still the device, not a regular file
        assert link.is_symlink()
    assert sorted(p.name for p in tmp_path.iterdir()) == ["link-to-null", "null"]


def test_fifo_named_as_output_is_streamed_to_its_reader(
        model: dict[str, Path], tmp_path: Path) -> None:
    fifo = tmp_path / "pipe"
    os.mkfifo(fifo)
    proc = subprocess.Popen([sys.executable, "-m", "rescore", "-q", "apply",
                             str(DEMO / "test.jsonl"), "--lm", str(model["lm"]),
                             "--weights", str(model["weights"]), "-o", str(fifo)],
                            cwd=ROOT, env={**os.environ, "PYTHONPATH": str(ROOT)},
                            stderr=subprocess.PIPE)
    with open(fifo, "rb") as reader:
        data = reader.read()
    _, err = proc.communicate(timeout=300)
    assert proc.returncode == 0, err
    assert stat.S_ISFIFO(fifo.stat().st_mode)
    # the demo test set holds 500 utterances (fixtures/demo/README.md), one line each
    assert data.count(b"\n") == 500


def test_dash_and_a_link_to_proc_self_fd_1_write_to_standard_output(
        model: dict[str, Path], tmp_path: Path) -> None:
    through_dash = _apply(model, "-")
    link = tmp_path / "out"
    link.symlink_to("/proc/self/fd/1")
    through_link = _apply(model, link)
    in_file = _apply(model, tmp_path / "file.jsonl")
    assert through_dash.returncode == through_link.returncode == in_file.returncode == 0
    assert through_dash.stdout == through_link.stdout == \
        (tmp_path / "file.jsonl").read_text()
    assert link.is_symlink()


# --- 2: the outputs of one command are checked before the work --------------------------

@pytest.mark.skipif(os.geteuid() == 0, reason="root writes in any folder")
def test_unwritable_analysis_folder_is_refused_before_tuning(
        model: dict[str, Path], tmp_path: Path) -> None:
    locked = tmp_path / "locked"
    locked.mkdir()
    locked.chmod(0o500)
    weights = tmp_path / "w.json"
    res = _cli(["tune", DEMO / "dev.jsonl", "--lm", model["lm"], "-o", weights,
                "--analysis", locked / "a.json", "--grid-lm", "0:10:3",
                "--grid-penalty", "0:1:2", "--folds", "0"])
    assert res.returncode == 1
    assert res.stderr.strip().splitlines()[-1] == \
        f"error: {locked}: output folder is not writable"
    assert not weights.exists()
