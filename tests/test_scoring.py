"""The combined score and the choice of the 1-best, checked against plain loops."""

from __future__ import annotations

from pathlib import Path

import numpy as np
import pytest
from hypothesis import given
from hypothesis import strategies as st

from rescore.nbest import iter_nbest
from rescore.scoring import (
    FeatureMatrix,
    build_matrix,
    choose,
    chosen_errors,
    oracle_rows,
    segment_argmax,
)
from rescore.weights import Weights
from tests.conftest import FIXTURES


def _plain_argmax(scores: list[float], sizes: list[int]) -> list[int]:
    # obviously correct: first index of the maximum in each segment
    out, start = [], 0
    for size in sizes:
        seg = scores[start:start + size]
        out.append(start + seg.index(max(seg)))
        start += size
    return out


@given(st.lists(st.lists(st.integers(-3, 3), min_size=1, max_size=6), min_size=1, max_size=20))
def test_segment_argmax_matches_loop_ties_to_earliest(lists: list[list[int]]) -> None:
    # small integer scores make ties frequent; the contract sends ties to the earlier one
    scores = [float(x) for seg in lists for x in seg]
    sizes = [len(seg) for seg in lists]
    offsets = np.concatenate([[0], np.cumsum(sizes)])
    got = segment_argmax(np.array(scores), offsets)
    assert got.tolist() == _plain_argmax(scores, sizes)


def test_segment_argmax_many_points_at_once() -> None:
    rng = np.random.default_rng(0)
    offsets = np.array([0, 3, 4, 9])
    scores = rng.normal(size=(9, 7))
    both = segment_argmax(scores, offsets)
    for j in range(7):
        assert both[:, j].tolist() == segment_argmax(scores[:, j], offsets).tolist()


def test_total_is_the_contract_formula() -> None:
    # total = acoustic_scale*acoustic + lm_weight*lm + penalty*words + sum w_k*features[k]
    path = FIXTURES / "nbest_two_utterances.jsonl"
    items = list(iter_nbest(path))[1:]
    m = build_matrix(items, path=str(path), features=["first_pass_lm"], with_errors=True).matrix
    w = Weights(acoustic_scale=0.5, insertion_penalty=2.0, features={"first_pass_lm": 1.0})
    # -59.6, -58.25 and -72.0: the second hypothesis wins
    expected = [0.5 * -95.0 + 2.0 * 4 + 1.0 * -20.1, 0.5 * -96.5 + 2.0 * 4 + 1.0 * -18.0,
                0.5 * -140.0 + 0.0 + 1.0 * -2.0]
    assert np.allclose(m.values @ w.vector(m.names), expected)
    assert choose(m, w).tolist() == [1]
    # reference "lamp bank four dimmed": 1, 0 and 4 word errors
    assert m.errors is not None and m.errors.tolist() == [1, 0, 4]
    assert oracle_rows(m).tolist() == [1]


def test_recognizer_weights_reproduce_its_first_choice(sample_dir: Path) -> None:
    # The sample's README: the recognizer ranked by acoustic + filler_penalty
    # + 9.5 * first_pass_lm - 0.6296 * (words + 1); the constant -0.6296 per list does not
    # change the choice, so insertion penalty -0.6296 per word reproduces rank 1 everywhere.
    for name in ("warehouse_flite.jsonl", "warehouse_espeak.jsonl"):
        path = sample_dir / name
        m = build_matrix(list(iter_nbest(path)), path=str(path),
                         features=["first_pass_lm", "filler_penalty"]).matrix
        w = Weights(1.0, 0.0, -0.6296, {"first_pass_lm": 9.5, "filler_penalty": 1.0})
        assert (choose(m, w) == 0).all()
        # and the rule is not vacuous: acoustics alone choose otherwise somewhere
        assert (choose(m, Weights()) != 0).any()


def _plain_choice(values: np.ndarray, offsets: np.ndarray, vector: np.ndarray) -> list[int]:
    """The rule spelled out: per list, the first hypothesis with the highest total."""
    out = []
    for u in range(len(offsets) - 1):
        best, best_total = 0, -np.inf
        for h, row in enumerate(range(offsets[u], offsets[u + 1])):
            total = sum(float(v) * float(w) for v, w in zip(values[row], vector, strict=True))
            if total > best_total:
                best, best_total = h, total
        out.append(best)
    return out


@pytest.mark.parametrize("seed", range(20))
def test_choice_kernel_matches_the_plain_rule_on_random_lists(seed: int) -> None:
    # small integers make equal totals (ties) common, so the earlier-wins rule is exercised;
    # the plain loop sums in the same order as the product of a row of 3, so equal is equal
    rng = np.random.default_rng(seed)
    sizes = rng.integers(1, 8, size=int(rng.integers(1, 40)))
    offsets = np.concatenate([[0], np.cumsum(sizes)]).astype(np.int64)
    values = rng.integers(-3, 4, size=(int(offsets[-1]), 3)).astype(np.float64)
    errors = rng.integers(0, 5, size=int(offsets[-1])).astype(np.int64)
    matrix = FeatureMatrix(names=("acoustic", "lm", "words"), values=values, offsets=offsets,
                           ids=tuple(str(i) for i in range(len(sizes))), errors=errors)
    weights = Weights(float(rng.integers(0, 3)), float(rng.integers(-2, 3)),
                      float(rng.integers(-2, 3)))
    expected = _plain_choice(values, offsets, weights.vector(matrix.names))
    assert choose(matrix, weights).tolist() == expected
    assert choose(matrix, weights.vector(matrix.names)).tolist() == expected
    assert chosen_errors(matrix, weights) == sum(
        int(errors[offsets[u] + h]) for u, h in enumerate(expected))
