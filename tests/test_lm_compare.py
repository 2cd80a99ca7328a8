"""Perplexities side by side: own vocabulary against the shared (union) vocabulary."""

from __future__ import annotations

import itertools
import json
import math
from pathlib import Path

import numpy as np
import pytest

from rescore.lm import NGramModel, load_model, read_corpus, save_model
from rescore.lm.mix import Mixture, compare_models
from rescore.lm.vocab import oov_counts
from tests.conftest import FIXTURES, run

DEMO = FIXTURES / "demo"
TOL = 1e-9  # relative: the same sums in a different order


def _lines(name: str, n: int) -> list[list[str]]:
    return list(itertools.islice(read_corpus(DEMO / name), n))


@pytest.fixture(scope="module")
def setup(tmp_path_factory: pytest.TempPathFactory) -> dict[str, Path]:
    tmp = tmp_path_factory.mktemp("compare")
    bg, small = NGramModel(3).fit(_lines("background.txt", 300)), \
        NGramModel(3).fit(_lines("train.txt", 60))
    save_model(bg, tmp / "bg.lm")
    save_model(small, tmp / "small.lm")
    held = [*_lines("dev.txt", 60), ["pump", "zyxxy", "seven"]]  # zyxxy: in no model
    (tmp / "held.txt").write_text("\n".join(" ".join(s) for s in held) + "\n")
    return {"bg": tmp / "bg.lm", "small": tmp / "small.lm", "held": tmp / "held.txt",
            "out": tmp / "mix.lm"}


def test_mix_json_own_perplexity_equals_lm_perplexity(setup: dict[str, Path]) -> None:
    res = run(["lm", "mix", setup["bg"], setup["small"], "--tune-on", setup["held"],
               "-o", setup["out"], "--json"])
    assert res.exit_code == 0, res.stderr
    data = json.loads(res.stdout)
    for i, name in enumerate(("bg", "small")):
        ppl = run(["lm", "perplexity", setup[name], setup["held"], "--json"])
        assert ppl.exit_code == 0, ppl.stderr
        own = json.loads(ppl.stdout)
        # the same figure 'lm perplexity' prints, not a recomputation that may drift
        assert data["component_own_perplexities"][i] == own["perplexity"]
        assert data["component_own_oov"][i] == own["oov"]
        # a model's own vocabulary counts its missing words as one easy <unk> event:
        # over the union vocabulary that mass is shared out, so the figure can only rise
        assert data["component_perplexities"][i] >= own["perplexity"]
    shared = data["shared_vocabulary"]
    assert shared["tokens"] == data["tokens"]
    union = set(Mixture([load_model(setup["bg"]), load_model(setup["small"])]).vocab.words[3:])
    held = list(read_corpus(setup["held"]))
    # counted directly: the words of the text outside every model's vocabulary
    assert shared["oov"] == sum(w not in union for s in held for w in s)
    assert shared["oov"] >= 1  # zyxxy at least


def test_shared_figures_from_the_definition_on_identical_tokens(
        setup: dict[str, Path]) -> None:
    models = [load_model(setup["bg"]), load_model(setup["small"])]
    held = list(read_corpus(setup["held"]))
    like = compare_models(models, held)
    mix = Mixture(models)
    n_tokens = sum(len(s) + 1 for s in held)  # every word and each </s>, never <s>
    assert like.vocabulary.tokens == n_tokens
    for i, m in enumerate(models):
        # per token, the documented union rule: the own probability of a known word, the
        # own <unk> probability divided by (unknown union words + 1) for the others
        known = set(m.vocab_.words[3:])
        shares = len(set(mix.vocab.words[3:]) - known) + 1
        total, count = 0.0, 0
        for sent in held:
            per = m.token_logprobs([sent])[0]
            for word, lp in zip([*sent, "</s>"], per, strict=True):
                total += float(lp) - (math.log(shares) if word not in known
                                      and word != "</s>" else 0.0)
                count += 1
        assert count == n_tokens
        # perplexity = exp(-(1/N) sum ln p) (the definition; Jurafsky & Martin, SLP3 ch. 3)
        expected = math.exp(-total / count)
        assert math.isclose(like.shared[i], expected, rel_tol=TOL)


def test_oov_counts_per_sentence() -> None:
    m = NGramModel(2).fit([["a", "b"], ["b", "c"]])
    # hand count: "a x b" has x unknown (1); "y z" both (2); "<s>" literal is unknown (1)
    got = oov_counts(m.vocab_, [["a", "x", "b"], ["y", "z"], [], ["<s>", "c"]])
    assert got.tolist() == [1, 2, 0, 1]
    assert m.oov_counts([["a", "x", "b"]]).tolist() == [1]
    assert got.dtype == np.int64
