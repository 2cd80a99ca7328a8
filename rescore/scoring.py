"""The feature matrix of a set of N-best lists and the combined score that picks the 1-best.

For each hypothesis:
    total = acoustic_scale * acoustic + lm_weight * lm + insertion_penalty * words
            + sum_k w_k * features[k]
The hypotheses of all utterances are rows of one matrix; utterance ``u`` owns rows
``offsets[u]:offsets[u + 1]``. Choosing the best hypothesis for a weight vector is a
matrix-vector product and a segmented argmax, ties going to the earlier hypothesis.
"""

from __future__ import annotations

from collections.abc import Mapping, Sequence
from dataclasses import dataclass, field
from typing import Protocol

import numpy as np

from rescore.counting import PLAIN, Counting
from rescore.errors import InputError, ParameterError, UsageError
from rescore.nbest import Utterance
from rescore.text import word_counts
from rescore.weights import ACOUSTIC, LM, WORDS, Weights
from rescore.wer import UNDEFINED_WER, word_errors


@dataclass(frozen=True)
class FeatureMatrix:
    """One row per hypothesis, one column per score; errors computed once against references.

    ``errors[r]`` is the word edit distance of row ``r`` to its utterance's reference and
    ``ref_words[u]`` the reference length of utterance ``u`` (both ``None`` without
    references). Searches only ever sum ``errors``; they never re-align.
    """

    names: tuple[str, ...]
    values: np.ndarray
    offsets: np.ndarray
    ids: tuple[str, ...]
    errors: np.ndarray | None = None
    ref_words: np.ndarray | None = None

    @property
    def n_utterances(self) -> int:
        return len(self.offsets) - 1

    @property
    def n_hypotheses(self) -> int:
        return int(self.values.shape[0])

    def column(self, name: str) -> np.ndarray:
        return self.values[:, self.names.index(name)]

    @property
    def utterance_of_row(self) -> np.ndarray:
        return np.repeat(np.arange(self.n_utterances), np.diff(self.offsets))

    def subset(self, utterances: np.ndarray) -> FeatureMatrix:
        """The rows of the given utterances (indices in ascending or any order)."""
        utterances = np.asarray(utterances, dtype=np.int64)
        starts, stops = self.offsets[utterances], self.offsets[utterances + 1]
        rows = np.concatenate([np.arange(a, b) for a, b in zip(starts, stops, strict=True)]) \
            if len(utterances) else np.zeros(0, dtype=np.int64)
        sizes = stops - starts
        offsets = np.concatenate([[0], np.cumsum(sizes)]).astype(np.int64)
        return FeatureMatrix(
            names=self.names,
            values=self.values[rows],
            offsets=offsets,
            ids=tuple(self.ids[u] for u in utterances),
            errors=None if self.errors is None else self.errors[rows],
            ref_words=None if self.ref_words is None else self.ref_words[utterances],
        )

    def truncate(self, depth: int) -> FeatureMatrix:
        """Keep only the first ``depth`` hypotheses of every list."""
        sizes = np.minimum(np.diff(self.offsets), depth)
        local = np.arange(self.n_hypotheses) - np.repeat(self.offsets[:-1], np.diff(self.offsets))
        rows = local < depth
        offsets = np.concatenate([[0], np.cumsum(sizes)]).astype(np.int64)
        return FeatureMatrix(
            names=self.names,
            values=self.values[rows],
            offsets=offsets,
            ids=self.ids,
            errors=None if self.errors is None else self.errors[rows],
            ref_words=self.ref_words,
        )


@dataclass(frozen=True, eq=False)
class DevMatrix(FeatureMatrix):
    """A feature matrix checked once for tuning (:meth:`check`): a reference for every
    utterance, at least one hypothesis in each list, finite scores, and reference words.
    Its subsets and truncations stay checked without checking again (a fold may hold no
    reference words: ``words`` is then 0). ``word_errors`` is ``errors`` as int64."""

    word_errors: np.ndarray = field(default_factory=lambda: np.zeros(0, dtype=np.int64))
    words: int = 0

    @classmethod
    def check(cls, matrix: FeatureMatrix) -> DevMatrix:
        """``matrix`` checked for tuning (returned as it is when it already is)."""
        if isinstance(matrix, DevMatrix):
            return matrix
        if matrix.errors is None or matrix.ref_words is None:
            raise InputError("tuning needs a reference for every utterance")
        if matrix.n_utterances == 0:
            raise InputError("no utterances to tune on")
        if np.any(np.diff(matrix.offsets) < 1):
            raise InputError("every utterance needs at least one hypothesis")
        if not np.isfinite(matrix.values).all():
            raise InputError("scores must be finite (NaN or infinite value in the feature "
                             "matrix)")
        checked = cls._of(matrix)
        if checked.words == 0:
            raise InputError(UNDEFINED_WER)
        return checked

    @classmethod
    def _of(cls, m: FeatureMatrix) -> DevMatrix:
        assert m.errors is not None and m.ref_words is not None
        return cls(m.names, m.values, m.offsets, m.ids, m.errors, m.ref_words,
                   word_errors=m.errors.astype(np.int64), words=int(m.ref_words.sum()))

    def subset(self, utterances: np.ndarray) -> DevMatrix:
        return DevMatrix._of(super().subset(utterances))

    def truncate(self, depth: int) -> DevMatrix:
        return DevMatrix._of(super().truncate(depth))

    def index(self, name: str) -> int:
        """The column of ``name``; a column not in the matrix is a :class:`ParameterError`."""
        if name not in self.names:
            raise ParameterError(f"no column {name!r} to tune; columns are "
                                 f"{', '.join(self.names)}", field="tune")
        return self.names.index(name)

    def first_errors(self) -> int:
        """Word errors of the recognizer's 1-best (the first hypothesis of every list)."""
        return int(self.word_errors[self.offsets[:-1]].sum())

    def oracle_errors(self) -> int:
        """Word errors of the fewest-error hypothesis of every list."""
        return int(self.word_errors[oracle_rows(self)].sum())


def segment_argmax(scores: np.ndarray, offsets: np.ndarray) -> np.ndarray:
    """Global row index of the highest score in each segment; ties go to the earliest row.

    Works on a 1-D score vector or on a 2-D array of shape (rows, points), giving one
    choice per segment per point.
    """
    starts = offsets[:-1]
    best = np.maximum.reduceat(scores, starts, axis=0)
    sizes = np.diff(offsets)
    spread = np.repeat(best, sizes, axis=0)
    n = scores.shape[0]
    rows = np.arange(n).reshape((n,) + (1,) * (scores.ndim - 1))
    candidates = np.where(scores >= spread, rows, n)
    return np.minimum.reduceat(candidates, starts, axis=0)


# --- the choice kernel: apply, tune and the report's depth curve all choose through here

def totals(matrix: FeatureMatrix, weights: Weights | np.ndarray) -> np.ndarray:
    """The combined score of every row; ``weights`` may be a vector over ``matrix.names``."""
    vector = weights.vector(matrix.names) if isinstance(weights, Weights) else weights
    return np.asarray(matrix.values @ vector)


def chosen_rows(matrix: FeatureMatrix, weights: Weights | np.ndarray,
                scores: np.ndarray | None = None) -> np.ndarray:
    """Global row of the chosen hypothesis of every utterance: the highest total, the
    earlier hypothesis on ties. ``scores`` are the :func:`totals` when already at hand."""
    return segment_argmax(totals(matrix, weights) if scores is None else scores,
                          matrix.offsets)


def choose(matrix: FeatureMatrix, weights: Weights | np.ndarray,
           scores: np.ndarray | None = None) -> np.ndarray:
    """Index within its list of the chosen hypothesis of every utterance."""
    return np.asarray(chosen_rows(matrix, weights, scores) - matrix.offsets[:-1])


def chosen_errors(matrix: FeatureMatrix, weights: Weights | np.ndarray,
                  errors: np.ndarray | None = None) -> int:
    """Word errors of the chosen hypotheses against the references (``errors`` per row,
    ``matrix.errors`` by default)."""
    errors = matrix.errors if errors is None else errors
    if errors is None:
        raise ValueError("errors need references")
    return int(errors[chosen_rows(matrix, weights)].sum())


def oracle_rows(matrix: FeatureMatrix) -> np.ndarray:
    """Global row of the fewest-error hypothesis of each utterance (earliest on ties)."""
    if matrix.errors is None:
        raise ValueError("oracle needs references")
    return segment_argmax(-matrix.errors.astype(np.float64), matrix.offsets)


class LanguageModel(Protocol):
    """What scoring needs of a model: natural-log sentence probabilities, with ``</s>``."""

    def logprob(self, sentences: Sequence[Sequence[str]]) -> np.ndarray: ...


def lm_column(name: str) -> str:
    """Column name of a language model: ``lm`` for the main one, ``lm:NAME`` for others."""
    return LM if name == LM else f"{LM}:{name}"


OOV = "oov_count"


def oov_column(name: str) -> str:
    """Column of a model's unknown-word count: ``oov_count`` for the main LM,
    ``oov_count:NAME`` for others (named as :func:`lm_column` names the scores)."""
    return OOV if name == LM else f"{OOV}:{name}"


def oov_features(lm_names: Sequence[str]) -> list[str]:
    """The unknown-word columns of the models named (``tune --oov-feature``)."""
    return [oov_column(n) for n in lm_names]


class CountsUnknownWords(Protocol):
    """A model that can say how many words of each sentence it lacks."""

    def oov_counts(self, sentences: Sequence[Sequence[str]]) -> np.ndarray: ...


def _oov_model(name: str, lms: Mapping[str, LanguageModel]) -> LanguageModel | None:
    """The model whose unknown-word count column ``name`` is, if it is one."""
    by_column = {oov_column(n): m for n, m in lms.items()}
    return by_column.get(name)


def _computed_oov(model: LanguageModel, name: str, toks: Sequence[list[str]]) -> np.ndarray:
    counter = getattr(model, "oov_counts", None)
    if counter is None:
        raise UsageError(f"feature {name!r}: this model cannot count unknown words")
    return np.asarray(counter(toks), dtype=np.float64)


@dataclass(frozen=True)
class Batch:
    """Utterances with their tokenised hypotheses and the matrix built from them."""

    matrix: FeatureMatrix
    tokens: Sequence[list[str]]


def _first_missing(items: Sequence[tuple[int, Utterance]], name: str) -> tuple[int, int]:
    for line, utt in items:
        for h, hyp in enumerate(utt["hypotheses"]):
            if name not in hyp.get("features", {}):
                return line, h
    raise AssertionError("no hypothesis lacks the feature")


def build_matrix(
    items: Sequence[tuple[int, Utterance]],
    *,
    path: str,
    lms: Mapping[str, LanguageModel] | None = None,
    features: Sequence[str] = (),
    with_errors: bool = False,
    counting: Counting = PLAIN,
) -> Batch:
    """The feature matrix of ``items`` (``(line, utterance)`` pairs from the reader).

    ``counting`` says what a token is (a word, or a character) for the LMs, the words
    column and the errors, and under which scoring rules the errors are counted.

    Columns: acoustic, one per language model, words, then each named feature. A named
    feature missing from a hypothesis is an error naming its line and field, except an
    unknown-word count of a model given (:func:`oov_column`), which is counted here.
    """
    lms = lms or {}
    names = (ACOUSTIC, *(lm_column(n) for n in lms), WORDS, *features)
    sizes = np.fromiter((len(u["hypotheses"]) for _, u in items), dtype=np.int64, count=len(items))
    offsets = np.zeros(len(items) + 1, dtype=np.int64)
    np.cumsum(sizes, out=offsets[1:])
    n = int(offsets[-1])
    values = np.empty((n, len(names)), dtype=np.float64)
    hyps = [hyp for _, utt in items for hyp in utt["hypotheses"]]
    toks = counting.lm_tokens_many([hyp["text"] for hyp in hyps])
    values[:, 0] = [hyp["acoustic"] for hyp in hyps]
    first_feature = 1 + len(lms) + 1
    values[:, first_feature - 1] = word_counts(toks)
    for j, name in enumerate(features):
        oov_model = _oov_model(name, lms)
        if oov_model is not None:
            # words outside that model's vocabulary, counted from the text, not the file
            values[:, first_feature + j] = _computed_oov(oov_model, name, toks) if n else 0.0
            continue
        try:
            values[:, first_feature + j] = [hyp["features"][name] for hyp in hyps]
        except KeyError:
            line, h = _first_missing(items, name)
            raise InputError(f"feature {name!r} is weighted but missing here",
                             path=path, line=line, field=f"hypotheses[{h}].features") from None
    errors = np.zeros(n, dtype=np.int64) if with_errors else None
    ref_words = np.zeros(len(items), dtype=np.int64) if with_errors else None
    if with_errors:
        assert errors is not None and ref_words is not None
        # the scored tokens are the LM's unless rules normalise or drop tokens their way
        scored = toks if counting.rules is None else [counting.score_tokens(hyp["text"])
                                                      for hyp in hyps]
        # without rules an error count is the edit distance (the method is the same, less
        # a call per hypothesis)
        errors_of = word_errors if counting.rules is None else counting.errors
        for u, (line, utt) in enumerate(items):
            if "reference" not in utt:
                raise InputError("reference needed", path=path, line=line, field="reference")
            ref = counting.score_tokens(utt["reference"])
            ref_words[u] = len(ref)
            for row in range(int(offsets[u]), int(offsets[u + 1])):
                errors[row] = errors_of(ref, scored[row])
    for j, model in enumerate(lms.values()):
        values[:, 1 + j] = model.logprob(toks) if n else 0.0
    matrix = FeatureMatrix(names=names, values=values, offsets=offsets,
                           ids=tuple(u["id"] for _, u in items), errors=errors,
                           ref_words=ref_words)
    return Batch(matrix=matrix, tokens=toks)
