"""Linear interpolation of n-gram models for a new domain, weights found by EM.

The mixture is ``P(w | h) = sum_i lambda_i P_i'(w | h)`` over the *union* of the
components' vocabularies. ``P_i'`` is component ``i`` widened to that union: a word it
knows keeps its own probability; its ``<unk>`` probability is divided evenly into
``u_i + 1`` shares, one for each of the ``u_i`` union words it does not know and one left
for ``<unk>`` itself. So each ``P_i'`` still sums to one over the union words, ``</s>`` and
``<unk>``, and so does the mixture, whose ``<unk>`` probability is the weighted remainder
``sum_i lambda_i P_i(<unk> | h) / (u_i + 1)``. A history word a component does not know
is its ``<unk>`` in that component's history.

The weights maximise the likelihood of held-out in-domain text. That likelihood is concave
in the weights (a sum of logs of linear functions over the simplex), so the EM updates
(each weight becomes the mean posterior of its component over the tokens) climb
monotonically to the global optimum.
"""

from __future__ import annotations

import math
from collections.abc import Sequence
from dataclasses import dataclass, field
from typing import Any

import numpy as np
import numpy.typing as npt

from rescore.arrays import F64, I64
from rescore.errors import ParameterError
from rescore.lm import fingerprint, hashindex
from rescore.lm.compare import LikeForLike, shared_vocabulary
from rescore.lm.evaluate import perplexity
from rescore.lm.model import NGramModel
from rescore.lm.tables import BackoffTables
from rescore.lm.vocab import SPECIALS, UNK_ID, Vocabulary


def union_vocabulary(models: Sequence[NGramModel]) -> Vocabulary:
    """Every component's words, in the order the components and their vocabularies give."""
    words: list[str] = []
    for m in models:
        words.extend(m.vocab_.words[len(SPECIALS):])
    return Vocabulary.from_words(words)


def check_weights(weights: Sequence[float], n: int) -> F64:
    """Weights as an array: ``n`` non-negative numbers summing to one."""
    w = np.asarray([float(x) for x in weights], dtype=np.float64)
    if len(w) != n:
        raise ParameterError(f"{len(w)} weights given for {n} models", field="weights")
    if not np.all(np.isfinite(w)) or np.any(w < 0):
        raise ParameterError(f"weights must be non-negative numbers, got {list(weights)}",
                             field="weights")
    if abs(float(w.sum()) - 1.0) > 1e-6:
        raise ParameterError(f"weights must sum to 1, got {float(w.sum()):.6g}", field="weights")
    return w


class Mixture:
    """The exact (dynamic) interpolation of fitted open-vocabulary models."""

    def __init__(self, models: Sequence[NGramModel], weights: Sequence[float] | None = None):
        if not models:
            raise ParameterError("a mixture needs at least one model")
        for i, m in enumerate(models):
            m._fitted()
            if m.closed_vocab:
                raise ParameterError(f"model {i + 1} has a closed vocabulary; mixing needs "
                                     "open-vocabulary models (unknown words as <unk>)")
        self.models = list(models)
        self.vocab = union_vocabulary(self.models)
        n = len(self.models)
        self.weights: F64 = (np.full(n, 1.0 / n) if weights is None
                             else check_weights(weights, n))
        # per component: union id -> its own id (UNK_ID where unknown), and log(u_i + 1)
        self.id_maps: list[I64] = []
        self.unk_shares: list[float] = []
        for m in self.models:
            own = m.vocab_.index
            ids = np.array([own.get(w, UNK_ID) for w in self.vocab.words], dtype=np.int64)
            self.id_maps.append(ids)
            unknown = int(np.count_nonzero(ids[len(SPECIALS):] == UNK_ID))
            self.unk_shares.append(math.log(unknown + 1))

    @property
    def order(self) -> int:
        return max(m.order_ for m in self.models)

    # --- per-token component matrices ----------------------------------------------------

    def _adjust(self, i: int, union_ids: I64, logp: F64) -> F64:
        """Component ``i``'s log-probabilities widened to the union (the ``<unk>`` rule)."""
        unknown = self.id_maps[i][union_ids] == UNK_ID
        out = logp.copy()
        out[unknown] -= self.unk_shares[i]
        return out

    def component_token_logprobs(self, sentences: Sequence[Sequence[str]]) -> F64:
        """(tokens, models) natural-log probabilities of every word and ``</s>``."""
        target = np.array([self.vocab.id_of(w) for s in sentences for w in [*s, "</s>"]],
                          dtype=np.int64)
        if len(target):
            target[np.cumsum([len(s) + 1 for s in sentences]) - 1] = 1  # </s>
        cols = []
        for i, m in enumerate(self.models):
            per = m.token_logprobs(sentences)
            flat = np.concatenate(per) if per else np.zeros(0)
            cols.append(self._adjust(i, target, flat))
        return np.stack(cols, axis=1) if cols else np.zeros((0, len(self.models)))

    def component_ngram_logprobs(self, ngrams: I64) -> F64:
        """(rows, models) log P_i'(last | rest) for n-grams of union ids (-1 pads the left)."""
        cols = []
        for i, m in enumerate(self.models):
            mapped = np.where(ngrams >= 0, self.id_maps[i][np.maximum(ngrams, 0)], -1)
            logp = m._fitted().score_ngrams(mapped)
            cols.append(self._adjust(i, ngrams[:, -1], logp))
        return np.stack(cols, axis=1)

    # --- the mixture --------------------------------------------------------------------

    def token_logprobs(self, sentences: Sequence[Sequence[str]]) -> F64:
        """Flat natural-log mixture probability of every word and ``</s>`` in order."""
        return mix_logprobs(self.component_token_logprobs(sentences), self.weights)

    def logprob_ngrams(self, ngrams: Sequence[Sequence[str]]) -> F64:
        """log P(last word | the words before it) under the mixture."""
        return mix_logprobs(self.component_ngram_logprobs(self.encode_ngrams(ngrams)),
                            self.weights)

    def encode_ngrams(self, ngrams: Sequence[Sequence[str]]) -> I64:
        index = self.vocab.index
        width = max((len(g) for g in ngrams), default=1)
        mat = np.full((len(ngrams), width), -1, dtype=np.int64)
        for row, gram in enumerate(ngrams):
            mat[row, width - len(gram):] = [index.get(w, UNK_ID) for w in gram]
        return mat


def mix_logprobs(component_logp: F64, weights: F64) -> F64:
    """``log sum_i w_i exp(logp[:, i])`` row by row, stable where terms are tiny."""
    with np.errstate(divide="ignore"):
        terms = component_logp + np.log(weights)[None, :]
    top = np.max(terms, axis=1)
    safe = np.where(np.isfinite(top), top, 0.0)
    with np.errstate(divide="ignore"):
        out: F64 = safe + np.log(np.exp(terms - safe[:, None]).sum(axis=1))
    return out


@dataclass(frozen=True)
class EMResult:
    weights: tuple[float, ...]
    log_likelihood: tuple[float, ...]  # natural log, after each iteration (index 0: start)
    iterations: int
    converged: bool
    tokens: int

    @property
    def perplexity(self) -> float:
        return math.exp(-self.log_likelihood[-1] / self.tokens) if self.tokens else math.nan


def estimate_weights(component_logp: F64, *, start: Sequence[float] | None = None,
                     tol: float = 1e-10, max_iter: int = 2000) -> EMResult:
    """EM for the interpolation weights on a (tokens, models) log-probability matrix.

    E step: the posterior of each component for each token; M step: the weights become the
    posteriors' means. Stops when the log-likelihood gains less than ``tol`` per token.
    """
    n_tok, n_models = component_logp.shape
    if n_tok == 0:
        raise ParameterError("the tuning text has no tokens to estimate mixture weights on")
    if not np.all(np.isfinite(component_logp).any(axis=1)):
        raise ParameterError("some tuning token has zero probability under every model")
    w = (np.full(n_models, 1.0 / n_models) if start is None
         else check_weights(start, n_models))
    # scale each row by its largest probability: posteriors and gains are unchanged
    shift = component_logp.max(axis=1)
    probs = np.exp(component_logp - shift[:, None])
    base = float(shift.sum())
    history = [base + float(np.log(probs @ w).sum())]
    converged = False
    while len(history) <= max_iter:
        mix = probs @ w
        w = w * (probs / mix[:, None]).mean(axis=0)
        w = w / w.sum()
        history.append(base + float(np.log(probs @ w).sum()))
        if history[-1] - history[-2] < tol * n_tok:
            converged = True
            break
    return EMResult(tuple(float(x) for x in w), tuple(history), len(history) - 1, converged,
                    n_tok)


def perplexity_of(logp: F64) -> float:
    """``exp(-mean log-probability)`` of a flat token array (``</s>`` counted, ``<s>`` not)."""
    return math.exp(-float(logp.sum()) / len(logp)) if len(logp) else math.nan


@dataclass(frozen=True)
class MixResult:
    """What ``lm mix`` reports: weights in the models' order and tuning-text perplexities."""

    weights: tuple[float, ...]
    perplexity: float | None
    component_perplexities: tuple[float, ...] | None
    merged_perplexity: float | None = None
    iterations: int = 0
    tokens: int = 0
    log_likelihood: tuple[float, ...] = field(default=(), repr=False)
    # the components' own-vocabulary figures and the shared vocabulary measured on
    like: LikeForLike | None = field(default=None, repr=False)

    def to_dict(self) -> dict[str, Any]:
        def finite(x: float | None) -> float | None:
            return x if x is not None and math.isfinite(x) else None

        return {
            "weights": list(self.weights),
            "perplexity": finite(self.perplexity),
            "component_perplexities": (None if self.component_perplexities is None
                                       else [finite(x) for x in self.component_perplexities]),
            "merged_perplexity": finite(self.merged_perplexity),
            "em_iterations": self.iterations,
            "tokens": self.tokens,
            **({} if self.like is None else {
                "component_own_perplexities": [finite(p.perplexity) for p in self.like.own],
                "component_own_oov": [p.oov for p in self.like.own],
                "shared_vocabulary": self.like.vocabulary.to_dict(),
            }),
        }


def like_for_like(mixture: Mixture, sentences: Sequence[Sequence[str]],
                  component_logp: F64 | None = None) -> LikeForLike:
    """The components' own perplexities and their perplexities over the union vocabulary
    (the same tokens for all); ``component_logp`` is reused when already computed."""
    comp = (mixture.component_token_logprobs(sentences) if component_logp is None
            else component_logp)
    return LikeForLike(
        own=tuple(perplexity(m, sentences) for m in mixture.models),
        shared=tuple(perplexity_of(comp[:, i]) for i in range(len(mixture.models))),
        vocabulary=shared_vocabulary(mixture.vocab, sentences))


def compare_models(models: Sequence[NGramModel], sentences: Sequence[Sequence[str]]
                   ) -> LikeForLike:
    """Like-for-like perplexities of any open-vocabulary models on one text."""
    return like_for_like(Mixture(models), [list(s) for s in sentences])


def mix_models(models: Sequence[NGramModel], tune_on: Sequence[Sequence[str]] | None, *,
               weights: Sequence[float] | None = None) -> tuple[Mixture, NGramModel, MixResult]:
    """Estimate (or take) the weights, merge into one back-off model, measure both."""
    mixture = Mixture(models)
    if tune_on is None:
        if weights is None:
            raise ParameterError("give tuning text to estimate weights on, or fixed weights",
                                 field="tune_on")
        mixture.weights = check_weights(weights, len(models))
        merged = merge(mixture)
        return mixture, merged, MixResult(tuple(float(x) for x in mixture.weights), None, None)
    sentences = [list(s) for s in tune_on]
    comp = mixture.component_token_logprobs(sentences)
    if weights is None:
        em = estimate_weights(comp)
        mixture.weights = np.asarray(em.weights)
        iterations, history = em.iterations, em.log_likelihood
    else:
        mixture.weights = check_weights(weights, len(models))
        iterations, history = 0, ()
    merged = merge(mixture)
    mixed = mix_logprobs(comp, mixture.weights)
    merged_logp = np.concatenate(merged.token_logprobs(sentences)) if sentences else np.zeros(0)
    result = MixResult(
        weights=tuple(float(x) for x in mixture.weights),
        perplexity=perplexity_of(mixed),
        component_perplexities=tuple(perplexity_of(comp[:, i]) for i in range(len(models))),
        merged_perplexity=perplexity_of(merged_logp),
        iterations=iterations, tokens=len(mixed), log_likelihood=history,
        like=like_for_like(mixture, sentences, comp),
    )
    return mixture, merged, result


__all__ = ["EMResult", "MixResult", "Mixture", "compare_models", "estimate_weights",
           "like_for_like", "mix_logprobs", "mix_models", "perplexity_of", "union_vocabulary"]


# --- the static merge: A mixture written as one back-off model (a static merge).
#
#
# The merged model lists the union of every component's n-grams (over the union vocabulary,
# closed under taking prefixes and suffixes). Each listed n-gram stores the exact mixture
# probability ``sum_i lambda_i P_i'(w | h)`` (see mix.py for ``P_i'``); each context's
# back-off weight is then recomputed so that its distribution sums to one:
#
#     bow(h) = (1 - sum_{w listed after h} P_mix(w | h)) / (1 - sum_{w listed after h} P(w | h'))
#
# where ``h'`` drops the first word of ``h`` and ``P(w | h')`` is the merged model's own
# lower-order probability. Unigrams are dense, so the empty context is the exact mixture.
# Listed n-grams therefore score exactly as the dynamic mixture does; an unlisted one backs
# off, which is where the merged model is an approximation.

def _unique_rows(parts: list[I64], width: int) -> I64:
    if not parts:
        return np.zeros((0, width), dtype=np.int64)
    return np.unique(np.concatenate(parts), axis=0)


def union_ngrams(mixture: Mixture) -> list[I64]:
    """Per order ``k`` (index k-1, from 2), the union's n-grams as rows of union ids."""
    order = mixture.order
    parts: list[list[I64]] = [[] for _ in range(order + 1)]
    for m in mixture.models:
        tables = m._fitted()
        # own id -> union id (the inverse of the union -> own map on the words it knows)
        to_union = np.array([mixture.vocab.index[w] for w in tables.vocab.words],
                            dtype=np.int64)
        for k in range(2, tables.order + 1):
            parts[k].append(to_union[tables.words_of(k)])
    grams: list[I64] = [np.zeros((0, 1), np.int64), np.zeros((0, 1), np.int64)]
    grams += [_unique_rows(parts[k], k) for k in range(2, order + 1)]
    # the back-off form needs every listed n-gram's context and suffix listed too
    for k in range(order, 2, -1):
        grams[k - 1] = _unique_rows([grams[k - 1], grams[k][:, :-1], grams[k][:, 1:]], k - 1)
    return grams


def merge(mixture: Mixture) -> NGramModel:
    """The mixture at its current weights as one normalised back-off ``NGramModel``."""
    vocab = mixture.vocab
    v = len(vocab)
    grams = union_ngrams(mixture)
    unigrams = np.arange(v, dtype=np.int64)[:, None]
    logp: list[F64] = [mix_logprobs(mixture.component_ngram_logprobs(unigrams),
                                    mixture.weights)]
    bow: list[F64] = []
    keys: list[npt.NDArray[np.uint64]] = [np.zeros(0, np.uint64)]
    slots: list[npt.NDArray[np.int32]] = [np.zeros(0, np.int32)]
    for k in range(2, mixture.order + 1):
        below = BackoffTables(vocab, logp, bow, keys, slots)
        g = grams[k]
        suffix = below.ids_of(g[:, 1:])
        key = below.key(suffix, g[:, 0])
        sort = np.argsort(key, kind="stable")
        g, key = g[sort], key[sort]
        p_mix = mix_logprobs(mixture.component_ngram_logprobs(g), mixture.weights)
        lower = below.score_ngrams(g[:, 1:])
        context = below.ids_of(g[:, :-1])
        n_ctx = len(logp[k - 2])
        num = 1.0 - np.bincount(context, weights=np.exp(p_mix), minlength=n_ctx)
        den = 1.0 - np.bincount(context, weights=np.exp(lower), minlength=n_ctx)
        with np.errstate(divide="ignore", invalid="ignore"):
            weight = np.where(den > 0, np.log(np.maximum(num, 0.0) / den), 0.0)
        bow.append(weight.astype(np.float64))
        logp.append(p_mix)
        keys.append(key)
        slots.append(hashindex.build_slots(key))
    tables = BackoffTables(vocab, logp, bow, keys, slots)
    meta = {
        "method": "mix",
        "mixture_weights": [float(x) for x in mixture.weights],
        "mixture_components": [m.checksum for m in mixture.models],
    }
    # the mixture was trained on every component's text: the union of their fingerprints
    return NGramModel.from_tables(
        tables, meta, sentence_hashes=fingerprint.union([m.sentence_hashes
                                                         for m in mixture.models]))
