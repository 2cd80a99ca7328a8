"""Smoothing methods, one class each behind one interface.

Every method is written in interpolated form. For an n-gram ``h w`` seen with count
``c(h w)`` (the counts that order uses), a method gives the numerator ``d(h w)`` of its own
share and an extra denominator mass ``e(h)`` per context, so that

    P(w | h) = d(h w) / (c(h) + e(h)) + gamma(h) * P(w | h')
    gamma(h) = (e(h) + sum_w (c(h w) - d(h w))) / (c(h) + e(h))

with ``c(h)`` the sum of the counts following ``h`` and ``h'`` the context without its first
word. Below the unigrams sits the uniform distribution over every token the model can
predict. ``gamma`` is a sum of non-negative terms, never a difference, so it is exactly
zero for maximum likelihood and never negative.
"""

from __future__ import annotations

from abc import ABC, abstractmethod
from collections.abc import Callable
from dataclasses import dataclass
from typing import ClassVar

import numpy as np

from rescore.arrays import F64, I64, B
from rescore.errors import UsageError
from rescore.lm.vocab import BOS_ID, UNK_ID


def predictable_tokens(v: int, closed_vocab: bool) -> tuple[B, int]:
    """Which of ``v`` token ids a model predicts (every one but ``<s>``, and but ``<unk>``
    in a closed vocabulary), and how many: the support of the uniform base distribution."""
    predictable = np.ones(v, dtype=bool)
    predictable[BOS_ID] = False
    if closed_vocab:
        predictable[UNK_ID] = False
    return predictable, int(predictable.sum())


@dataclass(frozen=True)
class OrderStats:
    """What a method sees of one order."""

    order: int
    counts: F64  # per n-gram: raw counts, or continuation counts for KN lower orders
    prefix: I64  # per n-gram: the id of its context (all zero for unigrams)
    n_contexts: int
    full: B  # per n-gram: the context is a whole history (top order, or begins with <s>)
    n_predictable: int  # words, </s> and (open vocabulary) <unk>

    def per_context(self, values: F64) -> F64:
        sums = np.bincount(self.prefix, weights=values, minlength=self.n_contexts)
        return sums.astype(np.float64)


@dataclass(frozen=True)
class Estimate:
    numer: F64
    extra: F64
    discounts: tuple[float, ...] = ()
    fallback: str | None = None


def count_histogram(counts: F64, upto: int = 4) -> I64:
    """How many n-grams occur 0 (not counted), 1, ..., ``upto`` and more than ``upto``
    times: the sum of the histograms of the parts of an order is that of the whole."""
    c = counts[counts > 0].astype(np.int64)
    return np.bincount(np.minimum(c, upto + 1), minlength=upto + 2)


def counts_of_counts(counts: F64, upto: int = 4) -> list[int]:
    """n_1 .. n_upto: how many n-grams occur exactly r times."""
    return of_histogram(count_histogram(counts, upto))


def of_histogram(hist: I64) -> list[int]:
    """n_1 .. n_upto of a :func:`count_histogram`."""
    return [int(hist[r]) for r in range(1, len(hist) - 1)]


def single_discount(n: list[int]) -> tuple[float, str | None]:
    """D = n1 / (n1 + 2 n2), or 0.5 when n1 or n2 is zero."""
    n1, n2 = n[0], n[1]
    if n1 == 0 or n2 == 0:
        return 0.5, f"n1={n1}, n2={n2}: discount set to 0.5"
    return n1 / (n1 + 2 * n2), None


def modified_discounts(n: list[int]) -> tuple[tuple[float, float, float], str | None]:
    """Chen and Goodman's D1, D2, D3+, or one discount for all when they are degenerate."""
    n1, n2, n3, n4 = n
    if min(n) > 0:
        y = n1 / (n1 + 2 * n2)
        d = (1 - 2 * y * n2 / n1, 2 - 3 * y * n3 / n2, 3 - 4 * y * n4 / n3)
        if 0 < d[0] <= 1 and 0 < d[1] <= 2 and 0 < d[2] <= 3:
            return d, None
        reason = f"discounts {d[0]:.4g}, {d[1]:.4g}, {d[2]:.4g} out of range"
    else:
        reason = f"counts of counts n1..n4 = {n1}, {n2}, {n3}, {n4}"
    one, why = single_discount(n)
    reason += "; one discount used" + (f" ({why})" if why else "")
    return (one, one, one), reason


@dataclass(frozen=True)
class PerNgram:
    """A method whose numerator is a function of each n-gram's count alone, once the
    order's counts of counts are known, and whose extra mass per context is the sum over
    the context of another such function (or nothing): it can be applied to an order a
    block of n-grams at a time, with the same values as applied whole."""

    numer: Callable[[F64], F64]
    extra_term: Callable[[F64], F64] | None = None
    discounts: tuple[float, ...] = ()
    fallback: str | None = None


class Smoother(ABC):
    """One smoothing method; ``estimate`` is called once per order, lowest first."""

    name: ClassVar[str]
    continuation: ClassVar[bool] = False  # lower orders use continuation counts

    def __init__(self, k: float = 1.0) -> None:
        self.k = k

    @abstractmethod
    def estimate(self, stats: OrderStats) -> Estimate: ...

    def per_ngram(self, counts_of_counts: list[int]) -> PerNgram | None:
        """The method in per-n-gram form for an order with these counts of counts
        (``n_1 .. n_4``), or None when it needs more than each count (e.g. the context)."""
        return None


class ByCount(Smoother):
    """A method that is :class:`PerNgram`: its whole-order estimate is that form applied
    to every n-gram at once (so the two ways give the same bits)."""

    def estimate(self, stats: OrderStats) -> Estimate:
        form = self.per_ngram(counts_of_counts(stats.counts))
        extra = (np.zeros(stats.n_contexts) if form.extra_term is None
                 else stats.per_context(form.extra_term(stats.counts)))
        return Estimate(form.numer(stats.counts), extra, form.discounts, form.fallback)

    @abstractmethod
    def per_ngram(self, counts_of_counts: list[int]) -> PerNgram: ...


def _copy(counts: F64) -> F64:
    return counts.copy()


def _seen(counts: F64) -> F64:
    return (counts > 0).astype(np.float64)


class MaximumLikelihood(ByCount):
    """Relative frequencies; an unseen context falls back to the next shorter one."""

    name = "mle"

    def per_ngram(self, counts_of_counts: list[int]) -> PerNgram:
        return PerNgram(_copy)


class AddK(Smoother):
    """Lidstone: (c + k) / (c(h) + k V) for whole histories; shorter ones pass through."""

    name = "addk"

    def __init__(self, k: float = 1.0) -> None:
        if not (k > 0 and np.isfinite(k)):
            raise UsageError(f"k must be a positive number, got {k}")
        super().__init__(k)

    def estimate(self, stats: OrderStats) -> Estimate:
        # A shortened context is only reached by backing off from an unseen whole history,
        # whose Lidstone estimate is uniform: pass it straight down to the uniform level.
        numer = np.where(stats.full, stats.counts, 0.0)
        full_ctx = stats.per_context(stats.full.astype(np.float64)) > 0
        if stats.order == 1:
            full_ctx = np.array([bool(stats.full[0])])
        extra = np.where(full_ctx, self.k * stats.n_predictable, 0.0)
        return Estimate(numer, extra)


class WittenBell(ByCount):
    """Interpolated Witten-Bell: the lower order gets weight T(h) / (c(h) + T(h))."""

    name = "wb"

    def per_ngram(self, counts_of_counts: list[int]) -> PerNgram:
        return PerNgram(_copy, _seen)  # T(h): the distinct words seen after h


class AbsoluteDiscount(ByCount):
    """Interpolated absolute discounting, one discount per order from raw counts.

    ``discount`` fixes D for every order instead of estimating it from the counts.
    """

    name = "abs"

    def __init__(self, k: float = 1.0, discount: float | None = None) -> None:
        if discount is not None and not 0 < discount <= 1:
            raise UsageError(f"a fixed discount must be in (0, 1], got {discount}")
        super().__init__(k)
        self.discount = discount

    def per_ngram(self, counts_of_counts: list[int]) -> PerNgram:
        if self.discount is not None:
            d, why = self.discount, None
        else:
            d, why = single_discount(counts_of_counts)

        def numer(counts: F64) -> F64:
            return np.maximum(counts - d, 0.0)
        return PerNgram(numer, None, (d,), why)


class KneserNey(AbsoluteDiscount):
    """Interpolated Kneser-Ney: one discount per order, continuation counts below the top."""

    name = "kn"
    continuation = True


class ModifiedKneserNey(ByCount):
    """Interpolated modified Kneser-Ney (Chen and Goodman 1998): three discounts per order."""

    name = "mkn"
    continuation = True

    def per_ngram(self, counts_of_counts: list[int]) -> PerNgram:
        (d1, d2, d3), why = modified_discounts(counts_of_counts)

        def numer(c: F64) -> F64:
            disc = np.select([c <= 0, c < 1.5, c < 2.5], [0.0, d1, d2], d3)
            out: F64 = np.maximum(c - disc, 0.0)
            return out
        return PerNgram(numer, None, (d1, d2, d3), why)


METHODS: dict[str, type[Smoother]] = {
    cls.name: cls
    for cls in (ModifiedKneserNey, KneserNey, WittenBell, AbsoluteDiscount, AddK, MaximumLikelihood)
}


def make_smoother(method: str, k: float = 1.0) -> Smoother:
    try:
        cls = METHODS[method]
    except KeyError:
        raise UsageError(
            f"unknown method {method!r}; expected one of {', '.join(METHODS)}"
        ) from None
    return cls(k)
