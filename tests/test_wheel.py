"""The wheel runs the demo outside the checkout (slow: builds a wheel and a fresh venv).

What a new user does: `pip install` the package into a fresh environment, away from the
source tree, and run `rescore demo --out X`. The demo data must come from the installed
package, and the figures must be the checkout's own.
"""

from __future__ import annotations

import json
import os
import subprocess
import sys
from pathlib import Path

from tests.conftest import ROOT


def _run(args: list[str | Path], cwd: Path) -> subprocess.CompletedProcess[str]:
    env = {k: v for k, v in os.environ.items() if k not in ("PYTHONPATH", "VIRTUAL_ENV")}
    res = subprocess.run([str(a) for a in args], cwd=cwd, env=env, capture_output=True,
                         text=True, timeout=1200)
    assert res.returncode == 0, f"{args}: {res.stdout[-2000:]}{res.stderr[-2000:]}"
    return res


def test_installed_wheel_runs_the_demo_outside_the_checkout(tmp_path: Path) -> None:
    dist = tmp_path / "dist"
    _run([sys.executable, "-m", "pip", "wheel", "--no-deps", "-q", "-w", dist, ROOT], tmp_path)
    wheels = sorted(dist.glob("rescore-*.whl"))
    assert len(wheels) == 1
    venv = tmp_path / "venv"
    _run([sys.executable, "-m", "venv", venv], tmp_path)
    _run([venv / "bin" / "python", "-m", "pip", "install", "-q", wheels[0]], tmp_path)
    where = _run([venv / "bin" / "python", "-c", "import rescore; print(rescore.__file__)"],
                 tmp_path).stdout.strip()
    assert Path(where).is_relative_to(venv), where  # the installed copy, not the checkout
    work = tmp_path / "elsewhere"
    work.mkdir()
    _run([venv / "bin" / "rescore", "demo", "--out", "X", "--json"], work)
    installed = json.loads((work / "X" / "summary.json").read_text())
    # the checkout's own demo on the same bundled data gives the same figures
    mine = tmp_path / "mine"
    _run([sys.executable, "-m", "rescore", "demo", "--out", mine, "--json"], ROOT)
    checkout = json.loads((mine / "summary.json").read_text())
    for key in ("wer_before", "wer_after", "lm_weight", "insertion_penalty", "utterances"):
        assert installed[key] == checkout[key], key
    assert list((work / "X").rglob("report.html"))


def test_bundled_data_lives_in_the_package() -> None:
    from rescore import demo

    assert demo.BUNDLED.is_relative_to(Path(demo.__file__).parent)
    assert {"train.txt", "dev.jsonl", "test.jsonl", "dev.txt", "background.txt"} <= {
        p.name for p in demo.BUNDLED.iterdir()}
