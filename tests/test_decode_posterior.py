"""List posteriors and the fitted posterior scale."""

from __future__ import annotations

import itertools
import math

import numpy as np
import pytest
from scipy.optimize import minimize_scalar
from scipy.special import logsumexp, softmax

from rescore.decode.posterior import fit_posterior_scale, oracle_log_likelihood, posteriors

TOL = 1e-9


def test_posteriors_match_scipy_softmax_per_list() -> None:
    # reference: scipy.special.softmax of s * totals, list by list
    rng = np.random.default_rng(3)
    sizes = rng.integers(1, 8, size=40)
    offsets = np.concatenate([[0], np.cumsum(sizes)])
    totals = rng.normal(-2000.0, 30.0, size=int(offsets[-1]))
    got = posteriors(totals, offsets, 0.37)
    for a, b in itertools.pairwise(offsets):
        np.testing.assert_allclose(got[a:b], softmax(0.37 * totals[a:b]), rtol=1e-12)


def test_posteriors_stay_finite_for_huge_totals() -> None:
    # exp(-1e6) underflows and exp(1e6) overflows without the per-list maximum subtracted;
    # with it, the two-hypothesis list is the logistic of the difference: 1 / (1 + e^-1)
    got = posteriors(np.array([-1e6, -1e6 - 1.0, 1e6]), np.array([0, 2, 3]), 1.0)
    assert np.all(np.isfinite(got))
    assert got[0] == pytest.approx(1.0 / (1.0 + math.exp(-1.0)), abs=TOL)
    assert got[2] == 1.0


def test_posteriors_at_scale_zero_are_uniform() -> None:
    # exp(0 * total) = 1 for every hypothesis: 1/3 each in a list of three
    got = posteriors(np.array([5.0, -3.0, 100.0]), np.array([0, 3]), 0.0)
    np.testing.assert_allclose(got, [1 / 3] * 3, rtol=1e-12)


@pytest.mark.parametrize("offsets", [[0, 2, 2, 3], [1, 3], [0, 2]])
def test_posteriors_refuse_bad_offsets(offsets: list[int]) -> None:
    with pytest.raises(ValueError):
        posteriors(np.zeros(3), np.array(offsets), 1.0)


def test_fit_scale_hand_case_is_log_of_the_odds() -> None:
    # Four lists of two hypotheses with totals (1, 0); the first hypothesis is the oracle
    # in three lists, the second in one. p(first) = e^s / (e^s + 1) = sigmoid(s) in every
    # list, so the likelihood is sigmoid(s)^3 (1 - sigmoid(s)), maximal at sigmoid(s) = 3/4,
    # i.e. s = log 3 (worked by hand).
    totals = np.array([1.0, 0.0] * 4)
    offsets = np.arange(0, 9, 2)
    errors = np.array([0, 1, 0, 1, 0, 1, 1, 0])
    fit = fit_posterior_scale(totals, offsets, errors)
    assert fit.scale == pytest.approx(math.log(3.0), rel=1e-5)
    assert not fit.at_bound
    # its likelihood: 3 log(3/4) + log(1/4)
    assert fit.log_likelihood == pytest.approx(3 * math.log(0.75) + math.log(0.25), abs=1e-9)
    record = fit.to_dict()
    assert record["scale"] == fit.scale and record["bounds"] == [1e-4, 1e2]


def _direct_log_likelihood(totals: np.ndarray, offsets: np.ndarray, errors: np.ndarray,
                           s: float) -> float:
    # from the definition: log of the posterior mass on the fewest-error rows, list by list
    out = 0.0
    for a, b in itertools.pairwise(offsets):
        t, e = s * totals[a:b], errors[a:b]
        out += logsumexp(t[e == e.min()]) - logsumexp(t)
    return float(out)


def test_fit_scale_agrees_with_scipy_bounded_search_on_random_lists() -> None:
    # reference: scipy.optimize.minimize_scalar (bounded) on the likelihood written from
    # its definition with scipy.special.logsumexp
    rng = np.random.default_rng(11)
    sizes = rng.integers(2, 10, size=60)
    offsets = np.concatenate([[0], np.cumsum(sizes)])
    n = int(offsets[-1])
    errors = rng.integers(0, 4, size=n)
    totals = -1.5 * errors + rng.normal(0.0, 2.0, size=n)  # scores that know something
    fit = fit_posterior_scale(totals, offsets, errors)
    ref = minimize_scalar(lambda x: -_direct_log_likelihood(totals, offsets, errors,
                                                            math.exp(x)),
                          bounds=(math.log(1e-3), math.log(1e2)), method="bounded",
                          options={"xatol": 1e-8})
    assert fit.log_likelihood >= -ref.fun - 1e-7
    assert math.log(fit.scale) == pytest.approx(ref.x, abs=1e-3)
    assert oracle_log_likelihood(totals, offsets, errors, fit.scale) == pytest.approx(
        _direct_log_likelihood(totals, offsets, errors, fit.scale), abs=1e-9)


def test_fit_scale_flags_a_bound() -> None:
    # scores that rank the oracle first in every list: the likelihood grows with s without
    # end, so the fit sits on the upper bound and says so
    totals = np.array([1.0, 0.0, 2.0, 0.5])
    fit = fit_posterior_scale(totals, np.array([0, 2, 4]), np.array([0, 1, 0, 2]),
                              bounds=(0.01, 10.0))
    assert fit.at_bound and fit.scale == pytest.approx(10.0)


def test_fit_scale_refuses_no_lists_and_bad_bounds() -> None:
    with pytest.raises(ValueError, match="no lists"):
        fit_posterior_scale(np.zeros(0), np.array([0]), np.zeros(0, dtype=int))
    with pytest.raises(ValueError, match="bounds"):
        fit_posterior_scale(np.zeros(2), np.array([0, 2]), np.array([0, 1]), bounds=(1.0, 0.5))
