"""A model's fingerprint of its training text, and the overlap of test sentences with it.

The fingerprint is the sorted set of 64-bit hashes (XXH3-64) of the normalised training
sentences, each hashed as its words joined by one space (UTF-8). It costs 8 bytes per
distinct training sentence in the model file, and is the only record of the text a model
keeps: the n-gram tables cannot tell a sentence seen whole from one pieced together. With
2**64 values, a false match among n distinct sentences and m test sentences has a
probability of about n * m / 2**64 (a million of each: about 5e-8).

Every caller (``lm build``, ``lm mix``, ``report``, ``check``) hashes through
:func:`sentence_hash`, so the same words always give the same hash.
"""

from __future__ import annotations

from array import array
from collections.abc import Iterable, Iterator, Sequence
from dataclasses import dataclass
from typing import TYPE_CHECKING, Any

import numpy as np
import numpy.typing as npt
import xxhash

from rescore.lm.vocab import BOS_ID, EOS_ID

if TYPE_CHECKING:
    from rescore.lm.model import NGramModel

U64 = npt.NDArray[np.uint64]
BYTES_PER_SENTENCE = 8
# common practice, not law: a test set sharing more than about 1 % of its sentences with
# the LM's training text has its WER flattered
DEFAULT_OVERLAP_WARN = 0.01


def sentence_hash(words: Sequence[str]) -> int:
    """XXH3-64 of the words joined by one space, as UTF-8."""
    return int(xxhash.xxh3_64_intdigest(" ".join(words).encode("utf-8")))


def fingerprint(sentences: Iterable[Sequence[str]]) -> U64:
    """Sorted unique hashes of the sentences."""
    hashes = array("Q", (sentence_hash(s) for s in sentences))
    return np.unique(np.frombuffer(hashes, dtype=np.uint64)) if hashes else np.zeros(
        0, np.uint64)


class Recorder:
    """Hashes each sentence an iterable yields as it passes (one pass over the text)."""

    def __init__(self, sentences: Iterable[Sequence[str]]) -> None:
        self._sentences = sentences
        self._hashes = array("Q")

    def __iter__(self) -> Iterator[Sequence[str]]:
        for s in self._sentences:
            self._hashes.append(sentence_hash(s))
            yield s

    def result(self) -> U64:
        return np.unique(np.frombuffer(self._hashes, dtype=np.uint64)) if self._hashes \
            else np.zeros(0, np.uint64)


class BlockRecorder:
    """Hashes each sentence of the clean blocks an iterable yields as they pass.

    A clean block (:func:`rescore.text.normalise_block`) holds one sentence a line, its
    words separated by one or more spaces; a line with no word is no sentence.
    """

    def __init__(self, blocks: Iterable[bytes]) -> None:
        self._blocks = blocks
        self._hashes = array("Q")

    def __iter__(self) -> Iterator[bytes]:
        digest = xxhash.xxh3_64_intdigest
        for block in self._blocks:
            self._hashes.extend(digest(b" ".join(words)) for line in block.split(b"\n")
                                if (words := line.split()))
            yield block

    def result(self) -> U64:
        return np.unique(np.frombuffer(self._hashes, dtype=np.uint64)) if self._hashes \
            else np.zeros(0, np.uint64)


def union(parts: Sequence[U64 | None]) -> U64 | None:
    """The fingerprint of the joined texts; None unless every part has one (a partial
    fingerprint would under-count a leak)."""
    if not parts or any(p is None for p in parts):
        return None
    return np.unique(np.concatenate([p for p in parts if p is not None]))


def contains(hashes: U64, queries: U64) -> npt.NDArray[np.bool_]:
    """Which queries are in the sorted ``hashes``."""
    if not len(hashes):
        return np.zeros(len(queries), dtype=bool)
    at = np.minimum(np.searchsorted(hashes, queries), len(hashes) - 1)
    found: npt.NDArray[np.bool_] = hashes[at] == queries
    return found


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
