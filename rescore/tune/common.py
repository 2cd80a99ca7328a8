"""Settings and the dev-set checks and counts every search shares."""

from __future__ import annotations

from collections.abc import Mapping
from dataclasses import replace
from typing import Any

from rescore.scoring import DevMatrix, FeatureMatrix, chosen_errors
from rescore.tune.results import Surface, TuneResult
from rescore.weights import ACOUSTIC, LM, WORDS, Weights

DEFAULT_LM_GRID = (0.0, 30.0, 121)
DEFAULT_PENALTY_GRID = (-20.0, 20.0, 81)
DEFAULT_BOUND = 100.0
# a grid whose fewest-errors region touches its edge is widened at most this many times
# (each adds half the axis's span: 40 -> 60 -> 90 -> 135 -> 202 for the default penalty)
MAX_WIDENINGS = 4
DEPTHS = (1, 2, 5, 10)
# elements of one (utterances x points x slots) score block; about 32 MB of float64
_BLOCK = 4_000_000
_MAX_SWEEPS = 50
# intervals of the line-search error curve narrower than this (relative) are rounding noise
_MIN_WIDTH = 1e-9


def _result(matrix: FeatureMatrix, weights: Weights, search: str, tuned: tuple[str, ...],
            surface: Surface | None, settings: Mapping[str, Any]) -> TuneResult:
    dev = DevMatrix.check(matrix)
    words = dev.words
    # dev errors from the same choice ``apply`` makes, so the two can never disagree
    errors = chosen_errors(dev, weights)
    return TuneResult(
        weights=weights, dev_errors=errors, dev_wer=errors / words,
        one_best_wer=dev.first_errors() / words, oracle_wer=dev.oracle_errors() / words,
        reference_words=words, utterances=dev.n_utterances, search=search, tuned=tuned,
        surface=surface, settings=dict(settings),
    )


def _set(weights: Weights, names: tuple[str, ...], updates: Mapping[str, float]) -> Weights:
    all_names = tuple(dict.fromkeys((ACOUSTIC, LM, WORDS, *names, *weights.features)))
    vec = weights.vector(all_names)
    for name, value in updates.items():
        vec[all_names.index(name)] = value
    out = Weights.from_vector(all_names, vec)
    # keep the feature map free of zero entries the caller never asked for
    feats = {k: v for k, v in out.features.items() if v != 0.0 or k in weights.features
             or k in updates}
    return replace(out, features=feats)
