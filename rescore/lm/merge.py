"""A mixture written as one back-off model (a static merge).

The merged model lists the union of every component's n-grams (over the union vocabulary,
closed under taking prefixes and suffixes). Each listed n-gram stores the exact mixture
probability ``sum_i lambda_i P_i'(w | h)`` (see mix.py for ``P_i'``); each context's
back-off weight is then recomputed so that its distribution sums to one:

    bow(h) = (1 - sum_{w listed after h} P_mix(w | h)) / (1 - sum_{w listed after h} P(w | h'))

where ``h'`` drops the first word of ``h`` and ``P(w | h')`` is the merged model's own
lower-order probability. Unigrams are dense, so the empty context is the exact mixture.
Listed n-grams therefore score exactly as the dynamic mixture does; an unlisted one backs
off, which is where the merged model is an approximation.
"""

from __future__ import annotations

import numpy as np
import numpy.typing as npt

from rescore.lm import fingerprint, hashindex
from rescore.lm.mix import Mixture, mix_logprobs
from rescore.lm.model import NGramModel
from rescore.lm.tables import BackoffTables

F64 = npt.NDArray[np.float64]
I64 = npt.NDArray[np.int64]


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
