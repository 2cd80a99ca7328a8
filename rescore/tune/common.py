"""Settings and the dev-set checks and counts every search shares."""

from __future__ import annotations

from collections.abc import Mapping
from dataclasses import replace
from typing import Any

import numpy as np

from rescore.errors import InputError, ParameterError
from rescore.scoring import FeatureMatrix, chosen_errors, oracle_rows
from rescore.tune.results import Surface, TuneResult
from rescore.weights import ACOUSTIC, LM, WORDS, Weights
from rescore.wer import UNDEFINED_WER

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




def _check_matrix(matrix: FeatureMatrix) -> tuple[np.ndarray, int]:
    if matrix.errors is None or matrix.ref_words is None:
        raise InputError("tuning needs a reference for every utterance")
    if matrix.n_utterances == 0:
        raise InputError("no utterances to tune on")
    if np.any(np.diff(matrix.offsets) < 1):
        raise InputError("every utterance needs at least one hypothesis")
    if not np.isfinite(matrix.values).all():
        raise InputError("scores must be finite (NaN or infinite value in the feature matrix)")
    words = int(matrix.ref_words.sum())
    if words == 0:
        raise InputError(UNDEFINED_WER)
    return matrix.errors.astype(np.int64), words


def _column_index(matrix: FeatureMatrix, name: str) -> int:
    if name not in matrix.names:
        known = ", ".join(matrix.names)
        raise ParameterError(f"no column {name!r} to tune; columns are {known}", field="tune")
    return matrix.names.index(name)


def _first_errors(matrix: FeatureMatrix) -> int:
    assert matrix.errors is not None
    return int(matrix.errors[matrix.offsets[:-1]].sum())


def _oracle_errors(matrix: FeatureMatrix) -> int:
    assert matrix.errors is not None
    return int(matrix.errors[oracle_rows(matrix)].sum())


def _result(matrix: FeatureMatrix, weights: Weights, search: str, tuned: tuple[str, ...],
            surface: Surface | None, settings: Mapping[str, Any]) -> TuneResult:
    _, words = _check_matrix(matrix)
    # dev errors from the same choice ``apply`` makes, so the two can never disagree
    errors = chosen_errors(matrix, weights)
    return TuneResult(
        weights=weights, dev_errors=errors, dev_wer=errors / words,
        baseline_wer=_first_errors(matrix) / words, oracle_wer=_oracle_errors(matrix) / words,
        reference_words=words, utterances=matrix.n_utterances, search=search, tuned=tuned,
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
