"""Mixing language models: EM weights, the union-vocabulary rule, the static merge, CLI."""

from __future__ import annotations

import itertools
import json
import math
from pathlib import Path

import numpy as np
import pytest

from rescore.lm import NGramModel, load_model, read_corpus, save_model
from rescore.lm.mix import Mixture, estimate_weights, merge, mix_logprobs, mix_models
from tests.conftest import FIXTURES, run

DEMO = FIXTURES / "demo"


def _lines(name: str, n: int, skip: int = 0) -> list[list[str]]:
    return list(itertools.islice(read_corpus(DEMO / name), skip, skip + n))


@pytest.fixture(scope="module")
def corpora() -> dict[str, list[list[str]]]:
    bg, ind = _lines("background.txt", 400), _lines("train.txt", 400)
    return {
        "bg": bg,
        "in": ind,
        # a broad model: some of both, so the best mixture is inside the simplex
        "broad": _lines("background.txt", 150, 400) + _lines("train.txt", 150, 400),
        # held out: in-domain mostly, some general sentences, and a word no model knows
        "held": _lines("dev.txt", 80) + _lines("background.txt", 40, 2000)
        + [["pump", "zyxxy", "seven"]],
    }


@pytest.fixture(scope="module")
def models(corpora: dict[str, list[list[str]]]) -> dict[str, NGramModel]:
    return {
        "bg": NGramModel(3).fit(corpora["bg"]),
        "in": NGramModel(3).fit(corpora["in"]),
        "broad": NGramModel(2, "wb").fit(corpora["broad"]),
    }


def _slow_mixture_logprob(models: list[NGramModel], weights: list[float],
                          gram: list[str]) -> float:
    """The documented rule word by word: plain loops, one n-gram at a time."""
    union: set[str] = set()
    for m in models:
        union |= set(m.vocab_.words[3:])
    total = 0.0
    for m, lam in zip(models, weights, strict=True):
        known = set(m.vocab_.words[3:])
        shares = len(union - known) + 1  # unknown union words plus <unk> itself
        word = gram[-1]
        if word in known or word == "</s>":
            p = math.exp(float(m.logprob_ngrams([gram])[0]))
        else:
            p = math.exp(float(m.logprob_ngrams([[*gram[:-1], "<unk>"]])[0])) / shares
        total += lam * p
    return math.log(total)


def _histories(mix: Mixture) -> list[list[str]]:
    return [[], ["<s>"], ["bay"], ["<s>", "bay"], ["the", "flight"], ["zyxxy"],
            ["pump", "seven"], ["<unk>", "to"]]


def _comp(models: dict[str, NGramModel], names: list[str],
          held: list[list[str]]) -> np.ndarray:
    return Mixture([models[n] for n in names]).component_token_logprobs(held)


def test_em_matches_a_one_dimensional_scan(models: dict[str, NGramModel],
                                           corpora: dict[str, list[list[str]]]) -> None:
    # the likelihood is concave in the weights, so a fine scan finds the same optimum
    # (brute force over the simplex; EM: Dempster, Laird and Rubin 1977)
    comp = _comp(models, ["in", "broad"], corpora["held"])
    em = estimate_weights(comp)
    grid = np.linspace(0.0, 1.0, 2001)
    ll = [mix_logprobs(comp, np.array([g, 1 - g])).sum() for g in grid]
    best = grid[int(np.argmax(ll))]
    assert 0.05 < best < 0.95  # an interior optimum, so the check has teeth
    assert abs(em.weights[0] - best) < 0.01


def test_em_matches_a_grid_over_three_weights(models: dict[str, NGramModel],
                                              corpora: dict[str, list[list[str]]]) -> None:
    # brute force over a 0.01 grid of the 2-simplex
    comp = _comp(models, ["bg", "in", "broad"], corpora["held"])
    em = estimate_weights(comp)
    best, best_ll = None, -math.inf
    steps = np.arange(0, 101) / 100
    for a in steps:
        for b in steps:
            if a + b > 1 + 1e-12:
                continue
            w = np.array([a, b, max(0.0, 1 - a - b)])
            ll = float(mix_logprobs(comp, w).sum())
            if ll > best_ll:
                best, best_ll = w, ll
    assert best is not None
    assert np.max(np.abs(np.array(em.weights) - best)) < 0.01 + 1e-9
    assert em.log_likelihood[-1] >= best_ll - 1e-6  # EM is no worse than the grid


def test_em_log_likelihood_never_decreases(models: dict[str, NGramModel],
                                           corpora: dict[str, list[list[str]]]) -> None:
    # EM monotonicity (Dempster, Laird and Rubin 1977)
    comp = _comp(models, ["bg", "in", "broad"], corpora["held"])
    for start in ([1 / 3] * 3, [0.98, 0.01, 0.01], [0.01, 0.01, 0.98]):
        em = estimate_weights(comp, start=start)
        steps = np.diff(em.log_likelihood)
        assert len(steps) >= 3
        assert np.all(steps >= -1e-9 * abs(em.log_likelihood[-1]))
        assert em.converged
        assert abs(sum(em.weights) - 1) < 1e-12


def test_mixture_beats_every_component_on_the_tuning_text(
        models: dict[str, NGramModel], corpora: dict[str, list[list[str]]]) -> None:
    # the component weights (1, 0, ...) are in the search space, and EM finds the maximum
    comps = [models["bg"], models["in"], models["broad"]]
    _, _, result = mix_models(comps, corpora["held"])
    assert result.component_perplexities is not None and result.perplexity is not None
    assert result.perplexity <= min(result.component_perplexities) + 1e-9
    assert all(math.isfinite(x) for x in result.component_perplexities)


def test_union_rule_matches_plain_version_and_sums_to_one(models: dict[str, NGramModel]) -> None:
    comps = [models["bg"], models["in"], models["broad"]]
    weights = [0.2, 0.5, 0.3]
    mix = Mixture(comps, weights)
    assert len(mix.vocab) > max(len(m.vocab_) for m in comps)  # vocabularies differ
    targets = [w for w in mix.vocab.words if w != "<s>"]  # union words, </s>, <unk>
    for h in _histories(mix):
        fast = mix.logprob_ngrams([[*h, w] for w in targets])
        # a proper distribution over the union, </s> and <unk>
        assert abs(float(np.exp(fast).sum()) - 1.0) < 1e-9, h
        for w in ("bay", "flight", "</s>", "<unk>", "keys", "pump"):
            slow = _slow_mixture_logprob(comps, weights, [*h, w])
            assert abs(float(fast[targets.index(w)]) - slow) < 1e-9, (h, w)
    # a single component widened to the union is a distribution too
    for m in comps:
        alone = Mixture(comps, [1.0 if c is m else 0.0 for c in comps])
        p = np.exp(alone.logprob_ngrams([["bay", w] for w in targets]))
        assert abs(float(p.sum()) - 1.0) < 1e-9


def test_token_logprobs_agree_with_ngram_scores(models: dict[str, NGramModel],
                                                corpora: dict[str, list[list[str]]]) -> None:
    mix = Mixture([models["bg"], models["in"]], [0.4, 0.6])
    sent = corpora["held"][-1]  # has a word no model knows
    padded = ["<s>", *sent, "</s>"]
    grams = [padded[max(0, i - 2): i + 1] for i in range(1, len(padded))]
    assert np.allclose(mix.token_logprobs([sent]), mix.logprob_ngrams(grams), atol=1e-12)
    assert np.all(np.isfinite(mix.token_logprobs([sent])))


def _contexts(merged: NGramModel) -> list[list[str]]:
    tables = merged.tables_
    words = tables.vocab.words
    out: list[list[str]] = [[]]
    for k in range(1, tables.order):
        out += [[words[i] for i in row] for row in tables.words_of(k)]
    return out


def test_merged_model_is_normalised_and_exact_on_listed_ngrams(
        models: dict[str, NGramModel]) -> None:
    comps = [models["bg"], models["in"], models["broad"]]
    mix = Mixture(comps, [0.25, 0.45, 0.3])
    merged = merge(mix)
    tables = merged.tables_
    v = tables.vsize
    words = tables.vocab.words
    # every context (the empty one and each listed n-gram below the top order) sums to one
    for k in range(0, tables.order):
        ctx = np.zeros((1, 0), np.int64) if k == 0 else tables.words_of(k)
        ctx = ctx[[w[0] != 1 and w[-1] != 1 for w in ctx]] if k else ctx  # nothing after </s>
        rows = np.repeat(ctx, v - 1, axis=0)
        last = np.tile(np.arange(1, v, dtype=np.int64), len(ctx))[:, None]
        p = np.exp(tables.score_ngrams(np.hstack([rows, last]))).reshape(len(ctx), v - 1)
        assert np.max(np.abs(p.sum(axis=1) - 1.0)) < 1e-9, k
    # every n-gram listed by any component scores as the dynamic mixture does
    listed: list[list[str]] = []
    for m in comps:
        cw = m.tables_.vocab.words
        for k in range(1, m.tables_.order + 1):
            listed += [[cw[i] for i in row] for row in m.tables_.words_of(k) if row[-1] != 0]
    got = merged.logprob_ngrams(listed)
    want = mix.logprob_ngrams(listed)
    assert np.max(np.abs(got - want)) < 1e-9
    assert set(words) == set(mix.vocab.words)


def test_merged_model_survives_native_and_arpa_files(models: dict[str, NGramModel],
                                                     tmp_path: Path) -> None:
    merged = merge(Mixture([models["bg"], models["in"]], [0.3, 0.7]))
    sents = _lines("dev.txt", 20)
    want = merged.logprob(sents)
    save_model(merged, tmp_path / "m.lm")
    save_model(merged, tmp_path / "m.arpa")
    assert np.array_equal(load_model(tmp_path / "m.lm").logprob(sents), want)
    # ARPA keeps log10 values to a limited number of digits
    assert np.allclose(load_model(tmp_path / "m.arpa").logprob(sents), want, atol=1e-3)


@pytest.mark.parametrize("weights", [[0.5, 0.5], [0.9, 0.1], [0.0, 1.0]])
def test_mixing_a_model_with_itself_changes_nothing(models: dict[str, NGramModel],
                                                    corpora: dict[str, list[list[str]]],
                                                    weights: list[float]) -> None:
    m = models["in"]
    held = corpora["held"]
    mix = Mixture([m, m], weights)
    want = np.concatenate(m.token_logprobs(held))
    assert np.allclose(mix.token_logprobs(held), want, atol=1e-12, rtol=0)
    merged = merge(mix)
    assert np.allclose(np.concatenate(merged.token_logprobs(held)), want, atol=1e-9, rtol=0)


def _write_models(tmp_path: Path, models: dict[str, NGramModel]) -> tuple[Path, Path, Path]:
    a, b = tmp_path / "bg.lm", tmp_path / "in.arpa"
    save_model(models["bg"], a)
    save_model(models["in"], b)
    held = tmp_path / "held.txt"
    held.write_text("\n".join(" ".join(s) for s in _lines("dev.txt", 60)
                              + _lines("background.txt", 20, 3000)) + "\n")
    return a, b, held


def test_cli_mix_json_and_output_model(models: dict[str, NGramModel], tmp_path: Path) -> None:
    a, b, held = _write_models(tmp_path, models)
    res = run(["lm", "mix", a, b, "--tune-on", held, "-o", tmp_path / "mix.lm", "--json"])
    assert res.exit_code == 0, res.stderr
    data = json.loads(res.stdout)
    assert {"weights", "perplexity", "component_perplexities"} <= set(data)
    assert len(data["weights"]) == 2 and abs(sum(data["weights"]) - 1) < 1e-9
    assert data["perplexity"] <= min(data["component_perplexities"]) + 1e-9
    # the output is the static merge, usable wherever a model is; its perplexity is the
    # one 'lm perplexity' measures
    ppl = run(["lm", "perplexity", tmp_path / "mix.lm", held, "--json"])
    assert ppl.exit_code == 0, ppl.stderr
    assert abs(json.loads(ppl.stdout)["perplexity"] - data["merged_perplexity"]) < 1e-6
    table = run(["lm", "mix", a, b, "--tune-on", held, "-o", tmp_path / "mix.arpa"])
    assert table.exit_code == 0 and "mixture (exact)" in table.stdout
    assert np.allclose(load_model(tmp_path / "mix.arpa").logprob([["bay", "seven"]]),
                       load_model(tmp_path / "mix.lm").logprob([["bay", "seven"]]), atol=1e-3)


def test_cli_mix_fixed_weights(models: dict[str, NGramModel], tmp_path: Path) -> None:
    a, b, held = _write_models(tmp_path, models)
    res = run(["lm", "mix", a, b, "--fixed-weights", "0.7,0.3", "--tune-on", held,
               "-o", tmp_path / "m.lm", "--json"])
    assert res.exit_code == 0, res.stderr
    assert json.loads(res.stdout)["weights"] == [0.7, 0.3]
    assert run(["lm", "mix", a, b, "--fixed-weights", "0.7,0.3", "-o", tmp_path / "n.lm"]
               ).exit_code == 0
    for bad in (["--fixed-weights", "0.7,0.2"], ["--fixed-weights", "0.5,0.25,0.25"],
                ["--fixed-weights", "x,y"], []):
        res = run(["lm", "mix", a, b, *bad, "-o", tmp_path / "bad.lm"])
        assert res.exit_code == 2, (bad, res.stdout, res.stderr)
        assert res.stderr.startswith("error:")
    assert not (tmp_path / "bad.lm").exists()
