"""n-gram language models: building, scoring, perplexity, ARPA and native files."""

from __future__ import annotations

from pathlib import Path

import numpy as np

from rescore.lm import arpa, store
from rescore.lm.corpus import Corpus, read_corpus
from rescore.lm.evaluate import (
    PerplexityResult,
    SentenceScore,
    perplexity,
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
    if is_arpa_name(path) or str(path) == "-":  # standard output: ARPA text
        arpa.write(model._fitted(), path, closed_vocab=model.closed_vocab)
    else:
        digest = store.save(model._fitted(), model.metadata_, path, model.extras())
        model._checksum = digest


def load_model(path: str | Path, *, verify: bool = False) -> NGramModel:
    """Read a model written by :func:`save_model` or any valid ARPA file, by its name.

    ``verify`` adds, for a native file, the structural checks that read every value (see
    :func:`rescore.lm.store.load_file`); the cheap ones always run.
    """
    if is_arpa_name(path) or str(path) == "-":  # standard input: ARPA text
        tables, meta = arpa.read(path)
        return NGramModel.from_tables(tables, meta)
    got = store.load_file(path, verify=verify)
    model = NGramModel.from_tables(got.tables, got.metadata, got.sha256)
    hashes = got.extras.get("sentence_hashes")
    if hashes is not None:
        if hashes.dtype != np.dtype("<u8"):
            raise store.bad_file(path, "extra.sentence_hashes is not uint64")
        model.sentence_hashes = hashes
    return model


__all__ = [
    "METHODS",
    "Corpus",
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
