"""A plain, slow, dict-based n-gram model: the definitions written out, to test against.

Every method in interpolated form, straight from its textbook formula:
  mle   P = c(hw) / c(h)                                       (unseen h: shorter h)
  addk  P = (c(hw) + k) / (c(h) + k V) for a whole history     (shorter ones: uniform)
  wb    P = (c(hw) + T(h) P') / (c(h) + T(h)),  T(h) = distinct words after h
  abs   P = (max(c(hw) - D, 0) + D N1+(h.) P') / c(h)
  kn    abs with continuation counts below the top order, except n-grams opening with <s>
  mkn   P = (max(c - D(c), 0) + (D1 N1(h.) + D2 N2(h.) + D3 N3+(h.)) P') / c(h)
P' is the same model one word of history shorter; below the unigrams the uniform
distribution over words, </s> and <unk> (open vocabulary).
"""

from __future__ import annotations

from collections import Counter, defaultdict
from collections.abc import Sequence
from typing import Any

import numpy as np

BOS, EOS, UNK = "<s>", "</s>", "<unk>"


def discounts_cg(n: list[int]) -> tuple[tuple[float, float, float], bool]:
    """Chen and Goodman's three discounts, or the single-discount fallback."""
    n1, n2, n3, n4 = n
    if min(n) > 0:
        y = n1 / (n1 + 2 * n2)
        d = (1 - 2 * y * n2 / n1, 2 - 3 * y * n3 / n2, 3 - 4 * y * n4 / n3)
        if 0 < d[0] <= 1 and 0 < d[1] <= 2 and 0 < d[2] <= 3:
            return d, False
    one = 0.5 if n1 == 0 or n2 == 0 else n1 / (n1 + 2 * n2)
    return (one, one, one), True


class ReferenceModel:
    def __init__(
        self,
        sentences: Sequence[Sequence[str]],
        order: int,
        method: str,
        k: float = 1.0,
        closed: bool = False,
        cutoffs: Sequence[int] | None = None,
    ) -> None:
        self.n, self.method, self.k, self.closed = order, method, k, closed
        self.words = sorted({w for s in sentences for w in s})
        self.predictable = [*self.words, EOS] + ([] if closed else [UNK])
        self.cut = [1, 1, *(cutoffs or [1] * (order - 1))]  # indexed by order
        self.raw: list[Counter[tuple[str, ...]]] = [Counter() for _ in range(order + 1)]
        for s in sentences:
            padded = [BOS, *s, EOS]
            for i in range(len(padded)):
                for m in range(1, order + 1):
                    if i - m + 1 >= 0:
                        self.raw[m][tuple(padded[i - m + 1:i + 1])] += 1
        self.raw[1].pop((BOS,), None)
        self.used: list[dict[tuple[str, ...], float]] = [{} for _ in range(order + 1)]
        for m in range(1, order + 1):
            for g, c in self.raw[m].items():
                if m == order or g[0] == BOS or method not in ("kn", "mkn"):
                    self.used[m][g] = c
                else:
                    self.used[m][g] = sum(1 for x in self.raw[m + 1] if x[1:] == g)
        self.ext: list[dict[tuple[str, ...], dict[str, float]]] = []
        for m in range(order + 1):
            table: dict[tuple[str, ...], dict[str, float]] = defaultdict(dict)
            for g, c in self.used[m].items():
                table[g[:-1]][g[-1]] = c
            self.ext.append(table)
        self.d: list[tuple[float, float, float]] = [(0.0, 0.0, 0.0)]
        for m in range(1, order + 1):
            vals = [c for c in self.used[m].values() if c > 0]
            n = [sum(1 for c in vals if c == r) for r in (1, 2, 3)]
            n.append(sum(1 for c in vals if c == 4))
            if method == "mkn":
                self.d.append(discounts_cg(n)[0])
            else:
                one = 0.5 if n[0] == 0 or n[1] == 0 else n[0] / (n[0] + 2 * n[1])
                self.d.append((one, one, one))

    def _alpha(self, m: int, h: tuple[str, ...], w: str, c: float, total: float) -> float:
        method = self.method
        if method in ("mle", "wb"):
            return c / (total + (len(self.ext[m][h]) if method == "wb" else 0))
        if method in ("abs", "kn"):
            return max(c - self.d[m][0], 0) / total
        if method == "mkn":
            d1, d2, d3 = self.d[m]
            return max(c - (d1 if c == 1 else d2 if c == 2 else d3), 0) / total
        raise AssertionError(method)

    def _gamma(self, m: int, h: tuple[str, ...], total: float) -> float:
        method = self.method
        nxt = self.ext[m][h]
        if method == "mle":
            return 0.0
        if method == "wb":
            t = sum(1 for c in nxt.values() if c > 0)
            return t / (total + t)
        if method in ("abs", "kn"):
            return self.d[m][0] * sum(1 for c in nxt.values() if c > 0) / total
        d1, d2, d3 = self.d[m]
        n1 = sum(1 for c in nxt.values() if c == 1)
        n2 = sum(1 for c in nxt.values() if c == 2)
        n3 = sum(1 for c in nxt.values() if c >= 3)
        return (d1 * n1 + d2 * n2 + d3 * n3) / total

    def prob(self, w: str, history: Sequence[str]) -> float:
        if w not in self.predictable:
            if self.closed or w == BOS:
                return 0.0
            w = UNK
        h = tuple(UNK if x not in self.words and x != BOS else x for x in history)
        h = h[max(0, len(h) - (self.n - 1)):]
        return self._p(w, h)

    def _p(self, w: str, h: tuple[str, ...]) -> float:
        m = len(h) + 1
        lower = self._p(w, h[1:]) if h else 1.0 / len(self.predictable)
        nxt = self.ext[m].get(h, {})
        total = sum(nxt.values())
        if total == 0:
            return lower
        full = m == self.n or (bool(h) and h[0] == BOS)
        if self.method == "addk":
            if not full:
                return lower
            denom = total + self.k * len(self.predictable)
            # n-grams below a cutoff give their count to the uniform share
            dropped_c = sum(c for v, c in nxt.items() if self.raw[m][(*h, v)] < self.cut[m])
            own = nxt.get(w, 0) if self.raw[m][(*h, w)] >= self.cut[m] else 0
            return own / denom + (self.k * len(self.predictable) + dropped_c) / denom * lower
        alpha_kept = 0.0
        dropped = 0.0
        for v, c in nxt.items():
            a = self._alpha(m, h, v, c, total)
            if self.raw[m][(*h, v)] < self.cut[m]:
                dropped += a
            elif v == w:
                alpha_kept = a
        return alpha_kept + (self._gamma(m, h, total) + dropped) * lower

    def sentence_logprob(self, sentence: Sequence[str]) -> float:
        import math

        padded = [BOS, *sentence, EOS]
        total = 0.0
        for i in range(1, len(padded)):
            if self.closed and padded[i] not in self.predictable:
                continue
            p = self.prob(padded[i], padded[:i])
            total += math.log(p) if p > 0 else -math.inf
        return total

    def histories(self) -> set[tuple[str, ...]]:
        """Every history the model has seen, at every length, plus an unseen one."""
        out: set[tuple[str, ...]] = {()}
        for m in range(2, self.n + 1):
            out.update(g[:-1] for g in self.raw[m])
        out.add(("never-seen",) * (self.n - 1))
        return out


def assert_matches_reference(model: Any, ref: ReferenceModel, tol: float) -> None:
    """Every word's probability after every history of ``ref`` (an unseen word included),
    from ``model``, within ``tol`` of the reference's formula."""
    words = [w for w in model.vocab_.words if w != "<s>"] + ["zzz-unseen"]
    for h in sorted(ref.histories()):
        got = model.logprob_ngrams([[*h, w] for w in words])
        want = [ref.prob(w, h) for w in words]
        np.testing.assert_allclose(np.exp(got), want, rtol=0, atol=tol)
