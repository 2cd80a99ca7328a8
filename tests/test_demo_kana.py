"""The second bundled scenario, scored in characters: its data, its generator and the CER
fall that `rescore demo --scenario kana` shows."""

from __future__ import annotations

import importlib.util
import json
import sys
from pathlib import Path
from types import ModuleType

import jiwer
import pytest

from rescore.demo_kana import BUNDLED_KANA, FILES, run_kana_demo
from rescore.text import tokens
from tests.conftest import run

ROOT = Path(__file__).resolve().parent.parent
SCRIPT = ROOT / "scripts" / "make_kana_demo_data.py"


def _script() -> ModuleType:
    spec = importlib.util.spec_from_file_location("make_kana_demo_data", SCRIPT)
    assert spec is not None and spec.loader is not None
    module = importlib.util.module_from_spec(spec)
    sys.modules[spec.name] = module
    spec.loader.exec_module(module)
    return module


def _records(name: str) -> list[dict[str, object]]:
    with open(BUNDLED_KANA / name, encoding="utf-8") as fh:
        return [json.loads(line) for line in fh if line.strip()]


def test_shipped_data_is_the_generators_output(tmp_path: Path) -> None:
    # common practice: bundled data regenerates byte for byte from its seeded script
    _script().build(tmp_path)
    for name in (*FILES, "README.md"):
        assert (tmp_path / name).read_bytes() == (BUNDLED_KANA / name).read_bytes(), name


def test_data_is_written_without_spaces_and_held_out() -> None:
    train = set((BUNDLED_KANA / "train.txt").read_text(encoding="utf-8").splitlines())
    refs = [str(u["reference"]) for u in _records("test.jsonl")]
    assert all(" " not in r for r in refs)
    assert not train & set(refs)  # test references are not in the LM's text


def test_demo_shows_a_cer_fall(tmp_path: Path) -> None:
    result = run_kana_demo(tmp_path / "out")
    s = result.summary
    # source: jiwer.cer (reference library) on the normalised references and the
    # recognizer's first hypotheses, the figure the demo calls "before"
    utts = _records("test.jsonl")
    refs = ["".join(tokens(str(u["reference"]))) for u in utts]
    first = ["".join(tokens(str(u["hypotheses"][0]["text"]))) for u in utts]  # type: ignore[index]
    assert s["cer_before"] == pytest.approx(jiwer.cer(refs, first))
    # the simulation was built for a clear fall towards the oracle (targets, not laws)
    assert s["oracle_cer"] <= s["cer_after"] < s["cer_before"] / 3
    report = json.loads((tmp_path / "out" / "report" / "report.json").read_text())
    assert report["provenance"]["unit"] == "char"
    assert report["after"]["wer"] == pytest.approx(s["cer_after"])
    md = (tmp_path / "out" / "report" / "report.md").read_text(encoding="utf-8")
    assert md.startswith("# Release report: CER before and after rescoring")
    # the README quotes this run's figures
    readme = (ROOT / "README.md").read_text(encoding="utf-8")
    assert (f"CER {100 * s['cer_before']:.2f}% before,\n{100 * s['cer_after']:.2f}% after, "
            f"oracle {100 * s['oracle_cer']:.2f}%") in readme


def test_demo_command_takes_the_scenario(tmp_path: Path) -> None:
    got = run(["demo", "--scenario", "kana", "--out", tmp_path / "k", "--json"])
    assert got.exit_code == 0, got.stderr
    assert json.loads(got.stdout)["unit"] == "char"
    bad = run(["demo", "--scenario", "klingon", "--out", tmp_path / "x"])
    assert bad.exit_code == 2 and "unknown scenario 'klingon'" in bad.stderr
