"""The overlap of test references with a model's training text: whole sentences found in
its fingerprint (:mod:`rescore.lm.fingerprint`) and n-grams its tables list."""

from __future__ import annotations

from collections.abc import Sequence
from dataclasses import dataclass
from typing import Any

import numpy as np

from rescore.lm.fingerprint import contains, sentence_hash
from rescore.lm.model import NGramModel
from rescore.lm.vocab import BOS_ID, EOS_ID

# common practice, not law: a test set sharing more than about 1 % of its sentences with
# the LM's training text has its WER flattered
DEFAULT_OVERLAP_WARN = 0.01


@dataclass(frozen=True)
class Overlap:
    """Test references found verbatim in a model's training text, and, when the model lists
    its n-grams of the highest order, the share of the references' n-grams of that order it
    lists (cut-offs and pruning drop some that training saw, so that share is a floor)."""

    references: int
    found: int
    model: str
    ngram_order: int | None = None
    ngrams: int | None = None
    ngrams_found: int | None = None

    @property
    def share(self) -> float | None:
        return self.found / self.references if self.references else None

    @property
    def ngram_share(self) -> float | None:
        return (self.ngrams_found / self.ngrams) if self.ngrams and self.ngrams_found is not None \
            else None

    def to_dict(self) -> dict[str, Any]:
        out: dict[str, Any] = {"references": self.references, "found": self.found,
                               "share": self.share, "model": self.model}
        if self.ngram_order is not None:
            out["ngram_order"] = self.ngram_order
            out["ngrams"] = self.ngrams
            out["ngrams_found"] = self.ngrams_found
            out["ngram_share"] = self.ngram_share
        return out


def overlap(model: NGramModel, references: Sequence[Sequence[str]], *,
            name: str = "") -> Overlap | None:
    """How many of the (non-empty) references the model was trained on, verbatim; None when
    the model carries no fingerprint (an ARPA file, or a file written before it existed)."""
    hashes = model.sentence_hashes
    if hashes is None:
        return None
    refs = [r for r in references if r]
    queries = np.array([sentence_hash(r) for r in refs], dtype=np.uint64)
    found = int(np.count_nonzero(contains(hashes, queries)))
    order, total, seen = _ngram_overlap(model, refs)
    return Overlap(len(refs), found, name, order, total, seen)


def _ngram_overlap(model: NGramModel,
                   refs: Sequence[Sequence[str]]) -> tuple[int | None, int | None, int | None]:
    """(order, n-grams, n-grams the model lists) over the references padded with <s> and
    </s>, at the model's highest order (from 2)."""
    tables = model._fitted()
    n = tables.order
    if n < 2:
        return None, None, None
    index = tables.vocab.index
    rows: list[list[int]] = []
    for r in refs:
        ids = [BOS_ID, *(index.get(w, -1) for w in r), EOS_ID]
        rows.extend(ids[i:i + n] for i in range(len(ids) - n + 1))
    if not rows:
        return n, 0, 0
    grams = np.array(rows, dtype=np.int64)
    known = (grams >= 0).all(axis=1)
    listed = np.zeros(len(grams), dtype=bool)
    if known.any():
        listed[known] = tables.ids_of(grams[known]) >= 0
    return n, len(grams), int(np.count_nonzero(listed))


@dataclass(frozen=True)
class OverlapSummary:
    """Test references found in the training text of any of the models (``found``), per
    model, and the models that carry no fingerprint and so could not be checked."""

    references: int
    found: int
    threshold: float
    per_model: tuple[Overlap, ...]
    unchecked: tuple[str, ...] = ()

    @property
    def share(self) -> float | None:
        """None when no model could be checked (or there is no reference)."""
        return self.found / self.references if self.references and self.per_model else None

    @property
    def leaked(self) -> bool:
        return self.share is not None and self.share > self.threshold

    def warning(self) -> str | None:
        if not self.leaked:
            return None
        return (f"{self.found} of {self.references} test references "
                f"({100 * (self.share or 0.0):.2f}%) are sentences of the language model's "
                f"training text (more than {100 * self.threshold:g}%): the test WER is "
                "flattered; train the LM without the test set")

    def warnings(self) -> list[str]:
        """The leak, if any, and the models that could not be checked."""
        out = [] if self.warning() is None else [str(self.warning())]
        if self.unchecked:
            out.append("no training-text fingerprint in " + ", ".join(self.unchecked)
                       + " (an ARPA file, or written before fingerprints): leakage of the "
                       "test set into its training text not checked")
        return out

    def to_dict(self) -> dict[str, Any]:
        return {"references": self.references, "found": self.found, "share": self.share,
                "threshold": self.threshold, "warned": self.leaked,
                "models": [o.to_dict() for o in self.per_model],
                "unchecked": list(self.unchecked)}


def overlap_summary(models: Sequence[tuple[str, NGramModel]],
                    references: Sequence[Sequence[str]], *,
                    threshold: float = DEFAULT_OVERLAP_WARN) -> OverlapSummary:
    """:func:`overlap` for each named model; a reference counts as found when any model's
    fingerprint holds it."""
    refs = [r for r in references if r]
    queries = np.array([sentence_hash(r) for r in refs], dtype=np.uint64)
    hit = np.zeros(len(refs), dtype=bool)
    per_model, unchecked = [], []
    for name, model in models:
        one = overlap(model, refs, name=name)
        if one is None or model.sentence_hashes is None:
            unchecked.append(name)
            continue
        per_model.append(one)
        hit |= contains(model.sentence_hashes, queries)
    return OverlapSummary(len(refs), int(np.count_nonzero(hit)), threshold, tuple(per_model),
                          tuple(unchecked))
