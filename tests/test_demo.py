"""The whole chain on the scenario: build an LM, tune on dev, rescore test, report."""

from __future__ import annotations

import hashlib
import json
import re
import subprocess
import sys
from pathlib import Path

import pytest

from tests.conftest import ROOT, run

SUMMARY_KEYS = {"wer_before", "wer_after", "oracle_wer", "lm_weight", "insertion_penalty",
                "utterances"}


@pytest.fixture(scope="module")
def small_data(tmp_path_factory: pytest.TempPathFactory) -> Path:
    out = tmp_path_factory.mktemp("small")
    subprocess.run([sys.executable, str(ROOT / "scripts" / "make_demo_data.py"), "--small",
                    "--out", str(out)], check=True, capture_output=True)
    return out


def _strip_provenance(data: object) -> object:
    if isinstance(data, dict):
        return {k: _strip_provenance(v) for k, v in data.items() if k != "provenance"}
    if isinstance(data, list):
        return [_strip_provenance(v) for v in data]
    return data


def test_demo_on_reduced_copy_lowers_wer(small_data: Path, tmp_path: Path) -> None:
    result = run(["demo", "--data", small_data, "--out", tmp_path / "out"])
    assert result.exit_code == 0, result.stderr
    for row in ("before", "after", "oracle"):  # each with its interval
        assert re.search(rf"^{row}\s.*\[\d+\.\d\d%, \d+\.\d\d%\]", result.stdout, re.M), row
    summary = json.loads((tmp_path / "out" / "summary.json").read_text())
    assert set(summary) >= SUMMARY_KEYS
    assert summary["utterances"] == 60
    # the LM must earn a fall; the oracle bounds what any rescoring can reach
    assert summary["oracle_wer"] <= summary["wer_after"] < summary["wer_before"]


def test_demo_is_reproducible(small_data: Path, tmp_path: Path) -> None:
    for name in ("a", "b"):
        assert run(["demo", "--data", small_data, "--out", tmp_path / name]).exit_code == 0
    a_files = sorted(p.relative_to(tmp_path / "a") for p in (tmp_path / "a").rglob("*")
                     if p.is_file())
    b_files = sorted(p.relative_to(tmp_path / "b") for p in (tmp_path / "b").rglob("*")
                     if p.is_file())
    assert a_files == b_files
    for rel in a_files:
        a, b = (tmp_path / "a" / rel).read_bytes(), (tmp_path / "b" / rel).read_bytes()
        if rel.suffix == ".json":
            # provenance records where files were; everything else must match exactly
            assert _strip_provenance(json.loads(a)) == _strip_provenance(json.loads(b)), rel
        elif rel.suffix in (".html", ".md"):
            continue  # the report's own reproducibility is checked in its tests
        else:
            assert a == b, rel


def test_demo_missing_data_is_a_clean_error(tmp_path: Path) -> None:
    result = run(["demo", "--data", tmp_path, "--out", tmp_path / "out"])
    assert result.exit_code == 1
    assert result.stderr.startswith(f"error: {tmp_path / 'train.txt'}: demo data file")
    assert len(result.stderr.strip().splitlines()) == 1


def test_demo_report_carries_the_tuning_analysis(small_data: Path, tmp_path: Path) -> None:
    # the tuner's --analysis output feeds the report's heat map and depth curve
    assert run(["demo", "--data", small_data, "--out", tmp_path]).exit_code == 0
    report = json.loads((tmp_path / "report" / "report.json").read_text())
    tuning = json.loads((tmp_path / "tuning.json").read_text())
    # one schema: the report's tuning record is the tuner's, key for key
    assert report["tuning"]["surface"] == tuning["surface"]
    assert report["tuning"]["depth"] == tuning["depth"]
    assert {k: report["tuning"][k] for k in ("lm_weight", "insertion_penalty")} == {
        k: tuning[k] for k in ("lm_weight", "insertion_penalty")}
    summary = json.loads((tmp_path / "summary.json").read_text())
    assert report["after"]["wer"] == summary["wer_after"]
    assert report["before"]["wer"] == summary["wer_before"]


def test_demo_report_records_its_weights(small_data: Path, tmp_path: Path) -> None:
    # the weights that made the after system are in the report's provenance, with the
    # file's SHA-256 (source: hashlib.sha256 of the written weights.json, computed here)
    assert run(["demo", "--data", small_data, "--out", tmp_path]).exit_code == 0
    weights_path = tmp_path / "weights.json"
    weights = json.loads(weights_path.read_text())
    recorded = json.loads((tmp_path / "report" / "report.json").read_text())[
        "provenance"]["weights"]
    assert recorded["sha256"] == hashlib.sha256(weights_path.read_bytes()).hexdigest()
    assert recorded["file"] == str(weights_path)
    for key in ("acoustic_scale", "lm_weight", "insertion_penalty", "features"):
        assert recorded[key] == weights[key], key
    assert f"sha256 {recorded['sha256']}" in (tmp_path / "report" / "report.md").read_text()
