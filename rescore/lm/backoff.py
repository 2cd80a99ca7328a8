"""From counts to a normalised back-off model: smoothing, cutoffs, entropy pruning.

The smoothed model is interpolated; it is turned into back-off form exactly: each listed
n-gram stores its interpolated probability and each context the weight ``gamma(h)`` that
the interpolation gives its lower order. Count cutoffs move a dropped n-gram's own share
into ``gamma(h)``, which keeps every distribution normalised. Entropy-based pruning
(Stolcke 1998) then removes n-grams whose removal raises perplexity by less than a
relative threshold and recomputes the back-off weights of the contexts that lost any.
An n-gram that is the context or the suffix of a kept longer n-gram is always kept, so
the tables stay closed under both.
"""

from __future__ import annotations

from collections.abc import Sequence
from concurrent.futures import ThreadPoolExecutor
from dataclasses import dataclass, field
from typing import Any

import numpy as np
import numpy.typing as npt

from rescore.arrays import F64, I64, B
from rescore.lm import hashindex
from rescore.lm.counts import OrderCounts
from rescore.lm.keys import table_keys
from rescore.lm.smoothing import OrderStats, Smoother, predictable_tokens
from rescore.lm.tables import BackoffTables
from rescore.lm.vocab import BOS_ID, Vocabulary
from rescore.process import give_back_freed_memory
from rescore.progress import Report, Steps


@dataclass
class _Work:
    """Per-order arrays while estimating; index k-1 describes order k."""

    suffix: list[I64]
    first: list[I64]
    prefix: list[I64]
    raw: list[F64]
    prob: list[F64] = field(default_factory=list)
    gamma: list[F64] = field(default_factory=list)  # gamma[k-1]: over order-k n-grams
    keep: list[B] = field(default_factory=list)
    sizes: list[int] = field(default_factory=list)  # n-grams of each order
    # per order, the n-grams whose count reaches the cutoff (the raw counts are let go as
    # soon as their order is estimated)
    counted: list[B] = field(default_factory=list)
    # hash slots of the unpruned keys of some orders, built while finding contexts; the
    # final tables reuse them where an order and every order below it lose nothing
    slots: dict[int, npt.NDArray[np.int32]] = field(default_factory=dict)


def _narrow(ids: I64) -> I64:
    """``ids`` as 32-bit integers where they fit (the same values: every use of the ids
    indexes with them or widens them first)."""
    if len(ids) and int(ids.max()) < (1 << 31) and int(ids.min()) >= 0:
        return ids.astype(np.int32, copy=False)
    return ids


def _prefixes(counts: list[OrderCounts], v: int
              ) -> tuple[list[I64], dict[int, npt.NDArray[np.int32]]]:
    """For each n-gram the id of its context (its first k-1 words) among the (k-1)-grams,
    and the hash slots built on the way (orders 2 to N-1: the contexts of the next order)."""
    order = len(counts)
    keys = {k: table_keys(counts[k - 1].suffix, counts[k - 1].first, v) for k in range(2, order)}
    # the tables of the context orders are independent: built on two threads
    with ThreadPoolExecutor(max_workers=2) as pool:
        slots = dict(zip(keys, pool.map(hashindex.build_slots, keys.values()), strict=True))
    prefix = [np.zeros(v, dtype=np.int64)]
    for k in range(2, order + 1):
        c = counts[k - 1]
        if k == 2:
            prefix.append(c.first.copy())
            continue
        # the context of w1..wk is w1 + (context of its suffix w2..wk)
        q = table_keys(prefix[k - 2][c.suffix], c.first, v)
        prefix.append(hashindex.lookup(slots[k - 1], keys[k - 1], q))
    return prefix, slots


def _used_counts(work: _Work, smoother: Smoother, k: int, order: int) -> F64:
    raw = work.raw[k - 1]
    if k == order or not smoother.continuation:
        used = raw.copy()
    else:
        # continuation counts, not raw counts, below the top order ...
        cont = np.bincount(work.suffix[k], minlength=len(raw)).astype(np.float64)
        # ... except for n-grams that begin with <s>, which have no left extension
        used = np.where(work.first[k - 1] == BOS_ID, raw, cont)
    if k == 1:
        used[BOS_ID] = 0.0
    return used


def estimate(
    counts: list[OrderCounts],
    smoother: Smoother,
    vocab: Vocabulary,
    *,
    closed_vocab: bool,
    cutoffs: Sequence[int] | None,
    prune: float | None,
    progress: Report | None = None,
    consume: bool = False,
) -> tuple[BackoffTables, dict[str, Any]]:
    """The back-off tables and metadata; ``progress`` hears of smoothing, pruning and
    indexing order by order (see :mod:`rescore.progress`).

    With ``consume``, ``counts`` is emptied and its arrays are let go as soon as they are
    used (the peak memory of a build: the caller keeps no other reference to them)."""
    order = len(counts)
    v = len(vocab)
    sizes = [len(c) for c in counts]
    smoothing = Steps(progress, "smoothing", order + 1)
    prefixes, slots = _prefixes(counts, v)
    work = _Work(suffix=[], first=[], prefix=prefixes, raw=[], slots=slots, sizes=sizes)
    for k, c in enumerate(counts):
        work.raw.append(c.count.astype(np.float64))
        if consume:  # the caller's arrays are let go: the ids in half the bytes
            counts[k] = OrderCounts(c.suffix[:0], c.first[:0], c.count[:0])
            work.suffix.append(_narrow(c.suffix))
            work.first.append(_narrow(c.first))
            work.prefix[k] = _narrow(work.prefix[k])
        else:
            work.suffix.append(c.suffix)
            work.first.append(c.first)
        del c
    if consume:
        counts.clear()
    smoothing()  # the context of every n-gram found
    predictable, n_pred = predictable_tokens(v, closed_vocab)
    cut = [1, *(cutoffs or [1] * (order - 1))]
    meta: dict[str, Any] = {"discounts": {}, "fallbacks": {}}
    alphas: list[F64] = []
    gamma0 = 1.0
    for k in range(1, order + 1):
        used = _used_counts(work, smoother, k, order)
        prefix = work.prefix[k - 1]
        n_ctx = 1 if k == 1 else sizes[k - 2]
        if k == 1:
            full = np.full(v, order == 1)
        else:
            full = np.full(len(used), k == order) | (work.first[k - 1] == BOS_ID)
        stats = OrderStats(k, used, prefix, n_ctx, full, n_pred)
        est = smoother.estimate(stats)
        if est.discounts:
            meta["discounts"][str(k)] = [round(d, 12) for d in est.discounts]
        if est.fallback:
            meta["fallbacks"][str(k)] = est.fallback
        dropped = work.raw[k - 1] < cut[k - 1]
        work.counted.append(~dropped)
        work.raw[k - 1] = work.raw[k - 1][:0]  # the last use of this order's counts
        numer = np.where(dropped, 0.0, est.numer)
        denom = stats.per_context(used) + est.extra
        lost = stats.per_context(est.numer - numer)  # the share of n-grams below a cutoff
        mass = est.extra + stats.per_context(used - est.numer) + lost
        safe = np.where(denom > 0, denom, 1.0)
        alphas.append(np.where(denom[prefix] > 0, numer / safe[prefix], 0.0))
        gamma = np.where(denom > 0, mass / safe, 1.0)
        if k == 1:
            gamma0 = float(gamma[0])
        else:
            work.gamma.append(gamma)
        smoothing()
    work.gamma.append(np.ones(0))  # the top order backs off to nothing: no weights

    p1 = alphas[0] + gamma0 / n_pred
    p1[~predictable] = 0.0
    work.prob.append(p1)
    for k in range(2, order + 1):
        ctx_gamma = work.gamma[k - 2][work.prefix[k - 1]]
        alpha, alphas[k - 1] = alphas[k - 1], alphas[0][:0]
        ctx_gamma *= work.prob[k - 2][work.suffix[k - 1]]
        ctx_gamma += alpha
        work.prob.append(ctx_gamma)
        del alpha, ctx_gamma
    del alphas

    _mark_kept(work)
    if prune is not None and prune > 0:
        _entropy_prune(work, prune, Steps(progress, "pruning", order - 1))
    # the tables need the words, the probabilities, the weights and what is kept
    work.prefix = [p[:0] for p in work.prefix]
    give_back_freed_memory()  # the estimation's temporaries: the peak comes next
    tables = _compact(work, vocab, Steps(progress, "indexing", order))
    meta["uniform_tokens"] = n_pred
    return tables, meta


def _protect(work: _Work, k: int) -> B:
    """Order-k n-grams that a kept (k+1)-gram needs as its context or its suffix."""
    need = np.zeros(work.sizes[k - 1], dtype=bool)
    if k < len(work.sizes):
        kept = work.keep[k]
        need[work.suffix[k][kept]] = True
        need[work.prefix[k][kept]] = True
    return need


def _mark_kept(work: _Work) -> None:
    order = len(work.sizes)
    work.keep = [np.ones(0, bool)] * order
    for k in range(order, 0, -1):
        if k == 1:
            work.keep[0] = np.ones(work.sizes[0], dtype=bool)
        else:
            work.keep[k - 1] = work.counted[k - 1] | _protect(work, k)


def _marginals(work: _Work) -> list[F64]:
    """log P(h) of each n-gram as a history: the product of its chain of probabilities."""
    with np.errstate(divide="ignore"):
        first = np.log(work.prob[0])
    first[BOS_ID] = 0.0  # a history that begins a sentence begins with certainty
    out = [first]
    for k in range(2, len(work.sizes) + 1):
        with np.errstate(divide="ignore"):
            own = np.log(work.prob[k - 1])
        out.append(out[k - 2][work.prefix[k - 1]] + own)
    return out


def _entropy_prune(work: _Work, threshold: float, tick: Steps) -> None:
    """Stolcke (1998): drop n-grams whose removal raises perplexity by less than threshold."""
    order = len(work.sizes)
    marg = _marginals(work)
    changed: list[B] = [np.zeros(len(g), dtype=bool) for g in work.gamma]
    for k in range(order, 1, -1):
        keep = work.keep[k - 1]
        prefix, suffix = work.prefix[k - 1], work.suffix[k - 1]
        p = work.prob[k - 1]
        pb = work.prob[k - 2][suffix]
        n_ctx = work.sizes[k - 2]
        listed = np.bincount(prefix, weights=np.where(keep, p, 0.0), minlength=n_ctx)
        listed_b = np.bincount(prefix, weights=np.where(keep, pb, 0.0), minlength=n_ctx)
        left = np.maximum(1.0 - listed, 0.0)[prefix]  # unlisted mass under h
        left_b = np.maximum(1.0 - listed_b, 0.0)[prefix]
        alpha = work.gamma[k - 2][prefix]
        with np.errstate(divide="ignore", invalid="ignore"):
            alpha_new = (left + p) / (left_b + pb)
            own = p * (np.log(pb) + np.log(alpha_new) - np.log(p))
            rest = np.where(left > 0, (np.log(alpha_new) - np.log(alpha)) * left, 0.0)
            delta = -np.exp(marg[k - 2][prefix]) * (own + rest)
            relative = np.expm1(np.where(np.isfinite(delta), delta, np.inf))
        candidate = keep & ~_protect(work, k)
        drop = candidate & (relative < threshold)
        work.keep[k - 1] = keep & ~drop
        changed[k - 2][prefix[drop]] = True
        tick()
    for k in range(2, order + 1):
        _reweigh(work, k, changed[k - 2])


def _reweigh(work: _Work, k: int, contexts: B) -> None:
    """Back-off weights of ``contexts`` after some of their n-grams were removed."""
    if not contexts.any():
        return
    keep = work.keep[k - 1]
    prefix = work.prefix[k - 1]
    p = np.where(keep, work.prob[k - 1], 0.0)
    pb = np.where(keep, work.prob[k - 2][work.suffix[k - 1]], 0.0)
    n_ctx = work.sizes[k - 2]
    left = np.maximum(1.0 - np.bincount(prefix, weights=p, minlength=n_ctx), 0.0)
    left_b = np.maximum(1.0 - np.bincount(prefix, weights=pb, minlength=n_ctx), 0.0)
    with np.errstate(divide="ignore", invalid="ignore"):
        new = np.where(left_b > 0, left / left_b, 1.0)
    work.gamma[k - 2] = np.where(contexts, new, work.gamma[k - 2])


def _let_go(work: _Work, k: int) -> None:
    """Drop the estimation arrays of order ``k`` (its tables are made)."""
    for ids in (work.suffix, work.first):
        ids[k - 1] = ids[k - 1][:0]
    for values in (work.prob, work.gamma):
        if len(values) >= k:
            values[k - 1] = values[k - 1][:0]
    work.slots.pop(k, None)


def _compact(work: _Work, vocab: Vocabulary, tick: Steps) -> BackoffTables:
    order = len(work.sizes)
    v = len(vocab)
    # ids of the kept n-grams of each order (None: all kept, the ids are unchanged)
    new_ids: list[I64 | None] = [None]
    for k in range(2, order):
        keep = work.keep[k - 1]
        new_ids.append(None if keep.all() else np.cumsum(keep) - 1)
    whole = np.logical_and.accumulate([bool(keep.all()) for keep in work.keep])

    def index(k: int) -> tuple[npt.NDArray[np.uint64], npt.NDArray[np.int32]]:
        if k == 1:
            return np.zeros(0, dtype=np.uint64), np.zeros(0, dtype=np.int32)
        keep = work.keep[k - 1]
        suffix, first = work.suffix[k - 1], work.first[k - 1]
        if not keep.all():
            suffix, first = suffix[keep], first[keep]
        below = new_ids[k - 2]
        kk = table_keys(suffix if below is None else below[suffix], first, v)
        # no order up to k lost an n-gram: ids and keys are those of the counts
        built = work.slots.get(k) if whole[k - 1] else None
        return kk, built if built is not None else hashindex.build_slots(kk)

    logp: list[F64] = []
    bow: list[F64] = []
    keys: list[npt.NDArray[np.uint64]] = []
    slots: list[npt.NDArray[np.int32]] = []
    # the orders' hash tables are independent; numpy releases the GIL while building them:
    # two orders at a time, and each order's estimation arrays let go once it is done
    with ThreadPoolExecutor(max_workers=2) as pool:
        pending = {k: pool.submit(index, k) for k in range(1, min(order, 2) + 1)}
        for k in range(1, order + 1):
            kk, ss = pending.pop(k).result()
            if k + 2 <= order:
                pending[k + 2] = pool.submit(index, k + 2)
            keep = work.keep[k - 1]
            every = bool(keep.all())  # then the log is taken in place (the arrays go next)
            with np.errstate(divide="ignore"):
                prob = work.prob[k - 1]
                logp.append(np.log(prob, out=prob) if every else np.log(prob[keep]))
                if k < order:
                    gamma = work.gamma[k - 1]
                    bow.append(np.log(gamma, out=gamma) if every else np.log(gamma[keep]))
                del prob
            keys.append(kk)
            slots.append(ss)
            del kk, ss
            _let_go(work, k)
            tick()
    return BackoffTables(vocab, logp, bow, keys, slots)
