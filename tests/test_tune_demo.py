"""Tuning on the demo scenario: exact search against a dense grid, and the gain over the
recognizer's own choice, with cross-validation reported."""

from __future__ import annotations

import numpy as np
import pytest

from rescore import pipeline
from rescore.lm import NGramModel, read_corpus, save_model
from rescore.scoring import FeatureMatrix, choose
from rescore.tune import exact_search, grid_search, tune
from rescore.weights import Weights
from tests.conftest import FIXTURES

DEMO = FIXTURES / "demo"


@pytest.fixture(scope="module")
def dev_matrix(tmp_path_factory: pytest.TempPathFactory) -> FeatureMatrix:
    folder = tmp_path_factory.mktemp("lm")
    model = NGramModel(order=3).fit(read_corpus([DEMO / "train.txt"]))
    save_model(model, folder / "logbook.lm")
    models = pipeline.load_lms([str(folder / "logbook.lm")])
    return pipeline.load_matrix(DEMO / "dev.jsonl", models=models, features=["first_pass_lm"])


def test_exact_search_no_worse_than_dense_grid_on_demo(dev_matrix: FeatureMatrix) -> None:
    # Och (2003): the line search follows the exact error curve, so within the same box it
    # should match the best of a dense 200 x 200 grid (our acceptance check; not a theorem, as the
    # search is coordinate-wise)
    lm_grid, pen_grid = np.linspace(0, 30, 200), np.linspace(-20, 20, 200)
    dense = grid_search(dev_matrix, lm_grid=lm_grid, penalty_grid=pen_grid)
    exact = exact_search(dev_matrix, bounds={"lm": (0.0, 30.0), "words": (-20.0, 20.0)})
    assert exact.dev_errors <= dense.dev_errors


def test_recognizer_order_is_the_documented_score(dev_matrix: FeatureMatrix) -> None:
    # the demo README: hypotheses are ordered by acoustic + 0.2 * features.first_pass_lm,
    # so with those weights every list's first hypothesis is chosen, and the baseline WER
    # (the first hypotheses) is the recognizer's own choice
    recognizer = Weights(features={"first_pass_lm": 0.2})
    assert np.all(choose(dev_matrix, recognizer) == 0)


def test_tuning_beats_the_recognizer_choice_and_reports_cv(dev_matrix: FeatureMatrix) -> None:
    result = tune(dev_matrix, folds=5, seed=0)
    # the demo README: the lists are the crew's logbook dictation and train.txt holds
    # in-domain logbook sentences, while the recognizer ranked with a generic add-one
    # unigram; a trigram of the right domain picking better is the premise of N-best
    # rescoring (common practice), so tuning its weight must beat the recognizer's choice
    assert result.dev_wer < result.one_best_wer
    assert result.cv is not None and len(result.cv.folds) == 5  # folds=5 asked, 500 utterances
    # k-fold cross-validation estimates the WER on unseen utterances (Hastie, Tibshirani and
    # Friedman, Elements of Statistical Learning, section 7.10, from memory): the gain must
    # hold there too
    assert result.cv.wer < result.one_best_wer
    # derived: every utterance is held out exactly once, so the folds cover every word
    assert result.cv.reference_words == result.reference_words


def test_adding_a_feature_never_loses_on_dev(dev_matrix: FeatureMatrix) -> None:
    two = tune(dev_matrix, folds=0)
    three = tune(dev_matrix, features=["first_pass_lm"], folds=0)
    assert three.search == "exact"
    # derived from the method (README, tuning): the exact search starts at the best
    # two-weight grid point (feature weight 0) and takes only moves that keep or lower the
    # error count, so it cannot end above the grid's errors
    assert three.dev_errors <= two.dev_errors
    # the errors reported are those of the choice the contract's formula makes at the
    # tuned weights (what `apply` will do), counted here from the per-hypothesis errors
    assert three.dev_errors == int(np.asarray(dev_matrix.errors)[
        choose(dev_matrix, three.weights) + dev_matrix.offsets[:-1]].sum())
