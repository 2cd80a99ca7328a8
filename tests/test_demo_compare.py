"""The demo's comparison table: perplexities over one vocabulary, the oov_count row."""

from __future__ import annotations

import json
from pathlib import Path

import pytest

from rescore.demo import BUNDLED, FULL_ROW, OOV_ROW, SMALL_ROW, run_demo
from tests.conftest import run


@pytest.fixture(scope="module")
def demo(tmp_path_factory: pytest.TempPathFactory) -> Path:
    if not (BUNDLED / "background.txt").is_file():
        pytest.skip("bundled demo data lacks background.txt")
    out = tmp_path_factory.mktemp("demo")
    run_demo(out)
    return out


def test_own_perplexity_is_lm_perplexity_of_each_model(demo: Path) -> None:
    summary = json.loads((demo / "summary.json").read_text())
    rows = {r["system"]: r for r in summary["comparison"]}
    files = {"background only": demo / "background.lm", SMALL_ROW: demo / "logbook-small.lm",
             "mixed (merged model)": demo / "mixed.lm", FULL_ROW: demo / "logbook.lm"}
    for system, model in files.items():
        res = run(["lm", "perplexity", model, BUNDLED / "dev.txt", "--json"])
        assert res.exit_code == 0, res.stderr
        own = json.loads(res.stdout)
        assert rows[system]["dev_perplexity_own"] == own["perplexity"], system
        assert rows[system]["dev_oov_own"] == own["oov"], system
        # every model measured on the same tokens as 'lm perplexity' counts them
        assert summary["comparison_vocabulary"]["tokens"] == own["tokens"]
        # sharing <unk> among more words can only lower a lacking model's probabilities
        assert rows[system]["dev_perplexity_shared"] >= own["perplexity"] * (1 - 1e-12)


def test_oov_row_weights_the_count_and_stores_it(demo: Path) -> None:
    summary = json.loads((demo / "summary.json").read_text())
    rows = {r["system"]: r for r in summary["comparison"]}
    assert "oov_count" in rows[OOV_ROW]["features"]
    assert "oov_count" not in rows["mixed (merged model)"]["features"]
    weights = json.loads((demo / "weights.mixed-oov.json").read_text())
    assert weights["features"]["oov_count"] == rows[OOV_ROW]["features"]["oov_count"]
