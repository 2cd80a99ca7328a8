"""n-gram language models: building, scoring, perplexity, ARPA and native files."""

from __future__ import annotations

from pathlib import Path

from rescore.lm import arpa, store
from rescore.lm.evaluate import (
    PerplexityResult,
    SentenceScore,
    perplexity,
    read_corpus,
    sentence_scores,
    summarise,
    write_sentence_scores,
)
from rescore.lm.mix import MixResult, Mixture, mix_models  # noqa: F401  (re-exported)
from rescore.lm.model import NGramModel
from rescore.lm.smoothing import METHODS

ARPA_SUFFIXES = (".arpa", ".arpa.gz")


def is_arpa_name(path: str | Path) -> bool:
    return str(path).lower().endswith(ARPA_SUFFIXES)


def save_model(model: NGramModel, path: str | Path) -> None:
    """Write ``model`` atomically: ARPA text for a ``.arpa``/``.arpa.gz`` name, else native."""
    if is_arpa_name(path):
        arpa.write(model._fitted(), path, closed_vocab=model.closed_vocab)
    else:
        digest = store.save(model._fitted(), model.metadata_, path,
                            {"sentence_hashes": model.sentence_hashes})
        model._checksum = digest


def load_model(path: str | Path) -> NGramModel:
    """Read a model written by :func:`save_model` or any valid ARPA file, by its name."""
    if is_arpa_name(path):
        tables, meta = arpa.read(path)
        return NGramModel.from_tables(tables, meta)
    tables, meta, digest, optional = store.load_with_optional(path)
    return NGramModel.from_tables(tables, meta, digest, optional["sentence_hashes"])


__all__ = [
    "METHODS",
    "NGramModel",
    "PerplexityResult",
    "SentenceScore",
    "load_model",
    "perplexity",
    "read_corpus",
    "save_model",
    "sentence_scores",
    "summarise",
    "write_sentence_scores",
]
