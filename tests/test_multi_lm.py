"""Several language models as separate log-linear features through tune and apply."""

from __future__ import annotations

import itertools
import json
from pathlib import Path

import numpy as np
import pytest

from rescore import demo
from rescore.lm import NGramModel, load_model, read_corpus, save_model
from rescore.text import tokens
from tests.conftest import FIXTURES, run

DEMO = FIXTURES / "demo"


@pytest.fixture(scope="module")
def setup(tmp_path_factory: pytest.TempPathFactory) -> dict[str, Path]:
    d = tmp_path_factory.mktemp("multi")
    for name, src in (("in.lm", "train.txt"), ("bg.arpa", "background.txt")):
        sents = list(itertools.islice(read_corpus(DEMO / src), 3000))
        save_model(NGramModel(3).fit(sents), d / name)
    for name in ("dev.jsonl", "test.jsonl"):
        lines = (DEMO / name).read_text().splitlines()[:120]
        (d / name).write_text("\n".join(lines) + "\n")
    return {"dir": d, "in": d / "in.lm", "bg": d / "bg.arpa", "dev": d / "dev.jsonl",
            "test": d / "test.jsonl"}


def _tune(s: dict[str, Path], out: Path, *lms: str, search: str) -> dict[str, object]:
    args = ["tune", s["dev"], "-o", out, "--search", search, "--folds", "0", "--json"]
    for lm in lms:
        args += ["--lm", lm]
    res = run(args)
    assert res.exit_code == 0, res.stderr
    data: dict[str, object] = json.loads(res.stdout)
    return data


def test_two_lms_tune_apply_end_to_end(setup: dict[str, Path]) -> None:
    d = setup["dir"]
    two = _tune(setup, d / "w2.json", str(setup["in"]), f"bg={setup['bg']}", search="exact")
    stored = json.loads((d / "w2.json").read_text())
    assert set(stored["features"]) == {"lm:bg"}
    assert stored["features"]["lm:bg"] == two["features"]["lm:bg"]  # type: ignore[index]
    assert set(stored["provenance"]["models"]) == {"lm", "bg"}

    res = run(["apply", setup["test"], "--lm", setup["in"], "--lm", f"bg={setup['bg']}",
               "--weights", d / "w2.json", "-o", d / "out.jsonl"])
    assert res.exit_code == 0, res.stderr
    # recompute every total from the contract's formula with each LM scored on its own
    main, bg = load_model(setup["in"]), load_model(setup["bg"])
    w = stored
    for line in (d / "out.jsonl").read_text().splitlines():
        utt = json.loads(line)
        texts = [tokens(h["text"]) for h in utt["hypotheses"]]
        lm_main, lm_bg = main.logprob(texts), bg.logprob(texts)
        want = np.array([
            w["acoustic_scale"] * h["acoustic"] + w["lm_weight"] * a
            + w["insertion_penalty"] * len(t) + w["features"]["lm:bg"] * b
            for h, t, a, b in zip(utt["hypotheses"], texts, lm_main, lm_bg, strict=True)])
        got = np.array([h["total"] for h in utt["hypotheses"]])
        assert np.allclose(got, want, rtol=1e-9, atol=1e-6)
        assert np.allclose([h["lm"] for h in utt["hypotheses"]], lm_main, atol=1e-9)
        # the highest total wins, ties to the earlier hypothesis (the contract's rule)
        assert utt["best"] == int(np.argmax(want))


def test_second_lm_weight_is_used_not_ignored(setup: dict[str, Path]) -> None:
    d = setup["dir"]
    base = {"acoustic_scale": 1.0, "lm_weight": 1.0, "insertion_penalty": 0.0}
    (d / "w_a.json").write_text(json.dumps(base | {"features": {"lm:bg": 0.0}}))
    (d / "w_b.json").write_text(json.dumps(base | {"features": {"lm:bg": 3.0}}))
    totals = []
    for name in ("w_a.json", "w_b.json"):
        res = run(["apply", setup["test"], "--lm", setup["in"], "--lm", f"bg={setup['bg']}",
                   "--weights", d / name, "-o", d / f"o_{name}.jsonl"])
        assert res.exit_code == 0, res.stderr
        first = json.loads((d / f"o_{name}.jsonl").read_text().splitlines()[0])
        totals.append(np.array([h["total"] for h in first["hypotheses"]]))
    texts = [tokens(h["text"]) for h in first["hypotheses"]]
    assert np.allclose(totals[1] - totals[0], 3.0 * load_model(setup["bg"]).logprob(texts))


def test_two_lms_do_no_worse_on_dev_than_one(setup: dict[str, Path]) -> None:
    # the one-LM weights are a point of the two-LM space (background weight 0), and the
    # exact search starts from the best grid point of LM weight and penalty and never
    # accepts a step that raises the errors
    d = setup["dir"]
    one = _tune(setup, d / "w1.json", str(setup["in"]), search="grid")
    two = _tune(setup, d / "w2b.json", str(setup["in"]), f"bg={setup['bg']}", search="exact")
    assert int(two["dev_errors"]) <= int(one["dev_errors"])  # type: ignore[call-overload]


def test_apply_without_the_second_model_is_a_usage_error(setup: dict[str, Path]) -> None:
    d = setup["dir"]
    _tune(setup, d / "w3.json", str(setup["in"]), f"bg={setup['bg']}", search="exact")
    res = run(["apply", setup["test"], "--lm", setup["in"], "--weights", d / "w3.json",
               "-o", d / "x.jsonl"])
    assert res.exit_code == 2
    assert "bg" in res.stderr
    assert not (d / "x.jsonl").exists()
    res = run(["tune", setup["dev"], "--lm", f"bg={setup['bg']}", "--lm", f"bg={setup['in']}",
               "-o", d / "w4.json"])
    assert res.exit_code == 2


def test_demo_compares_background_in_domain_mixed_and_two_lms(tmp_path: Path) -> None:
    import subprocess
    import sys

    from tests.conftest import ROOT

    data = tmp_path / "data"
    subprocess.run([sys.executable, str(ROOT / "scripts" / "make_demo_data.py"), "--small",
                    "--out", str(data)], check=True, capture_output=True)
    res = run(["demo", "--data", data, "--out", tmp_path / "out"])
    assert res.exit_code == 0, res.stderr
    assert "language models compared" in res.stdout
    summary = json.loads((tmp_path / "out" / "summary.json").read_text())
    rows = {r["system"]: r for r in summary["comparison"]}
    small, full = demo.SMALL_ROW, demo.FULL_ROW
    rules = [f"{full}, --choose {rule}" for rule in ("min-risk", "consensus")]
    assert list(rows) == ["background only", small, "mixed (merged model)",
                          demo.OOV_ROW, "log-linear, two LMs", full, *rules]
    # minimum expected word errors and the confusion-network vote, with the weights and
    # posterior scale tuned on dev, do no worse than the top score on test (the decision
    # rules' purpose: Stolcke, Konig and Weintraub 1997; Mangu, Brill and Stolcke 2000)
    for name in rules:
        assert rows[name]["test_wer"] <= rows[full]["test_wer"] + 1e-12
    # the contract's keys keep meaning the result of the model built from all of train.txt
    assert summary["wer_after"] == rows[full]["test_wer"]
    assert summary["dev_perplexity"] == rows[full]["dev_perplexity"]
    mixed = rows["mixed (merged model)"]
    assert abs(sum(mixed["mixture_weights"].values()) - 1) < 1e-9
    # EM's mixture is at least as good as either component on the text it was tuned on
    # (the held-out likelihood is concave in the weights; EM climbs to its maximum)
    assert mixed["mixture_perplexity"] <= min(rows["background only"]["dev_perplexity"],
                                              rows[small]["dev_perplexity"]) + 1e-9
    assert set(rows["log-linear, two LMs"]["features"]) == {"lm:background"}
    # the small in-domain model really is built from the first lines only
    small_model = load_model(tmp_path / "out" / "logbook-small.lm")
    full_model = load_model(tmp_path / "out" / "logbook.lm")
    assert len(small_model.vocab_) < len(full_model.vocab_)
    assert load_model(tmp_path / "out" / "mixed.lm").order_ == 3
