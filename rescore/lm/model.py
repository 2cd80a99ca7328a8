"""``NGramModel``: the estimator (settings in the constructor, ``fit`` learns) and scoring."""

from __future__ import annotations

import dataclasses
import hashlib
from collections.abc import Iterable, Sequence
from pathlib import Path
from typing import Any

import numpy as np
import numpy.typing as npt

from rescore.arrays import F64
from rescore.errors import UsageError
from rescore.lm.backoff import estimate
from rescore.lm.corpus import Corpus
from rescore.lm.counts import count_ngrams, window_floor
from rescore.lm.external import CorpusCounts, count_external, default_memory
from rescore.lm.fingerprint import BlockRecorder, Recorder
from rescore.lm.ondisk import build_on_disk, estimate_counted, streams
from rescore.lm.quantize import quantize
from rescore.lm.sharded import count_on_cluster
from rescore.lm.smoothing import METHODS, make_smoother
from rescore.lm.store import content_parts
from rescore.lm.tables import BackoffTables
from rescore.lm.vocab import (
    BOS_ID,
    UNK_ID,
    Stream,
    Vocabulary,
    choose_words,
    encode,
    first_pass,
    first_pass_blocks,
    oov_counts,
    remap,
    stream_from_lengths,
)
from rescore.progress import Report, Steps

MAX_ORDER = 6


class NGramModel:
    """An n-gram language model over normalised words.

    ``method`` is one of mkn (default), kn, wb, abs, addk, mle; ``k`` is the add-k constant;
    ``vocab`` fixes the vocabulary, else it is every training word seen ``min_count`` times,
    at most ``max_vocab`` of them by frequency. Words outside the vocabulary are ``<unk>``
    (an open vocabulary), or with ``closed_vocab`` are left out of every count and score.
    ``cutoffs[j]`` is the least raw count an n-gram of order ``j + 2`` needs to be kept;
    ``prune`` is a relative-perplexity threshold for entropy-based pruning.
    """

    def __init__(
        self,
        order: int = 3,
        method: str = "mkn",
        *,
        k: float = 1.0,
        vocab: Iterable[str] | None = None,
        max_vocab: int | None = None,
        min_count: int = 1,
        closed_vocab: bool = False,
        cutoffs: Sequence[int] | None = None,
        prune: float | None = None,
    ) -> None:
        self.order = order
        self.method = method
        self.k = k
        self.vocab = None if vocab is None else list(vocab)
        self.max_vocab = max_vocab
        self.min_count = min_count
        self.closed_vocab = closed_vocab
        self.cutoffs = None if cutoffs is None else list(cutoffs)
        self.prune = prune
        self._checksum: str | None = None
        #: sorted unique XXH3-64 hashes of the normalised training sentences (see
        #: :mod:`rescore.lm.fingerprint`), or None when unknown (an ARPA file, older files)
        self.sentence_hashes: npt.NDArray[np.uint64] | None = None

    # --- settings -------------------------------------------------------------------------

    def _check_settings(self) -> None:
        if not 1 <= self.order <= MAX_ORDER:
            raise UsageError(f"order must be between 1 and {MAX_ORDER}, got {self.order}")
        make_smoother(self.method, self.k)
        if self.cutoffs is not None:
            if len(self.cutoffs) != self.order - 1:
                raise UsageError(
                    f"cutoffs need one count per order 2..{self.order}, "
                    f"got {len(self.cutoffs)} for a {self.order}-gram model"
                )
            if any(c < 1 for c in self.cutoffs):
                raise UsageError(f"cutoffs must be at least 1, got {self.cutoffs}")
        if self.prune is not None and not (self.prune >= 0 and np.isfinite(self.prune)):
            raise UsageError(f"prune threshold must be a non-negative number, got {self.prune}")

    # --- fitting --------------------------------------------------------------------------

    def fit(self, sentences: Iterable[Sequence[str]], *,
            progress: Report | None = None, memory: int | None = None,
            scratch: str | Path | None = None) -> NGramModel:
        """Learn from token lists (already normalised; ``<s>`` and ``</s>`` are added here).

        ``progress`` (see :mod:`rescore.progress`) hears of the counting and smoothing,
        order by order. With ``memory`` (bytes), counting keeps within about that much
        memory whatever the size of the text, spilling sorted runs to a private folder
        under ``scratch`` (default: the system's temporary folder) and merging them; the
        model is the same, byte for byte. The model is then estimated one order at a time
        with its orders on disk in that folder and its native file written there and
        memory-mapped (see :mod:`rescore.lm.ondisk`), except with count cutoffs above 1 or
        entropy pruning, which estimate in memory.
        """
        self._check_settings()
        if memory is not None:
            recorder = Recorder(sentences)
            if streams(self.cutoffs, self.prune):  # the model's orders kept on disk
                built = build_on_disk(
                    recorder, self.order, self._choose_vocab, make_smoother(self.method, self.k),
                    closed_vocab=self.closed_vocab, memory=memory, scratch=scratch,
                    progress=progress)
                return self._set_built(built.tables, built.meta, built.sentences, built.words,
                                       built.oov, recorder.result())
            counted = count_external(recorder, self.order, self._choose_vocab,
                                     closed_vocab=self.closed_vocab, memory=memory,
                                     scratch=scratch, progress=progress)
            counted = dataclasses.replace(counted, sentence_hashes=recorder.result())
            return self._fit_counted(counted, progress, consume=True)
        # text from files, not yet read: whole blocks to ids at once
        if isinstance(sentences, Corpus) and sentences.unread:
            blocks = BlockRecorder(clean for _, clean in sentences.blocks())
            words, counts, body, lengths = first_pass_blocks(blocks)
            hashes = blocks.result
        else:
            recorder = Recorder(sentences)
            words, counts, body, lengths = first_pass(recorder)
            hashes = recorder.result
        vocab = self._choose_vocab(words, counts)
        stream = stream_from_lengths(remap(words, vocab)[body], lengths)
        floor = window_floor(stream, self.closed_vocab)
        counting = Steps(progress, "counting n-grams", self.order)
        ngram_counts = count_ngrams(stream.tokens, floor, self.order, len(vocab),
                                    progress=counting)
        counting.finish()
        oov = int(np.count_nonzero(stream.tokens == UNK_ID))
        n_words = len(body)
        del stream, floor, body  # the counts are all the estimation needs
        return self._fit_counted(CorpusCounts(vocab, ngram_counts, len(lengths), n_words,
                                              oov, 0, hashes()), progress, consume=True)

    def fit_on_cluster(self, paths: Sequence[str | Path], cluster: str, *,
                       memory: int | None = None, scratch: str | Path | None = None,
                       workers: int | None = None, progress: Report | None = None
                       ) -> NGramModel:
        """Learn from text files whose n-grams are counted on a Dask cluster.

        ``cluster`` is a scheduler's address (every worker must see ``paths`` under the
        same names) or ``"local"`` for ``workers`` processes on this machine (default:
        one per core). The shards' counts are merged here within about ``memory`` bytes
        (default: half the memory available) in a folder under ``scratch``; the model is
        the same, byte for byte, as :meth:`fit` on :func:`rescore.lm.read_corpus` of the
        files.
        """
        self._check_settings()
        counted = count_on_cluster(
            paths, self.order, self._choose_vocab, closed_vocab=self.closed_vocab,
            cluster=cluster, memory=default_memory() if memory is None else memory,
            scratch=scratch, workers=workers, progress=progress)
        if streams(self.cutoffs, self.prune):  # the model's orders kept on disk
            tables, meta = estimate_counted(
                counted.tables, counted.vocab, make_smoother(self.method, self.k),
                closed_vocab=self.closed_vocab, scratch=scratch, progress=progress)
            return self._set_built(tables, meta, counted.sentences, counted.words,
                                   counted.oov, counted.sentence_hashes)
        return self._fit_counted(counted, progress, consume=True)

    def _set_built(self, tables: BackoffTables, meta: dict[str, Any], sentences: int,
                   words: int, oov: int, hashes: npt.NDArray[np.uint64] | None) -> NGramModel:
        self._set_fitted(tables, {**meta, "training_sentences": sentences,
                                  "training_words": words, "training_oov": oov})
        self.sentence_hashes = hashes
        return self

    def _choose_vocab(self, words: Sequence[str], counts: npt.NDArray[np.int64]) -> Vocabulary:
        return Vocabulary.from_words(
            choose_words(words, counts, given=self.vocab, max_vocab=self.max_vocab,
                         min_count=self.min_count)
        )

    def fit_counts(self, counted: CorpusCounts, *, progress: Report | None = None
                   ) -> NGramModel:
        """Learn from n-gram counts already made (by the external or the cluster counter)."""
        return self._fit_counted(counted, progress, consume=False)

    def _fit_counted(self, counted: CorpusCounts, progress: Report | None, *,
                     consume: bool) -> NGramModel:
        """As :meth:`fit_counts`; with ``consume``, the count tables are emptied as they
        are used (the caller made them for this and keeps no other reference)."""
        self._check_settings()
        tables, meta = estimate(
            counted.tables, make_smoother(self.method, self.k), counted.vocab,
            closed_vocab=self.closed_vocab, cutoffs=self.cutoffs, prune=self.prune,
            progress=progress, consume=consume,
        )
        self._set_fitted(tables, {
            **meta,
            "training_sentences": counted.sentences,
            "training_words": counted.words,
            "training_oov": counted.oov,
        })
        self.sentence_hashes = counted.sentence_hashes
        return self

    def _set_fitted(self, tables: BackoffTables, extra: dict[str, Any]) -> None:
        self.tables_ = tables
        self.vocab_ = tables.vocab
        self.order_ = tables.order
        self.n_ngrams_ = tables.n_ngrams()
        self.metadata_: dict[str, Any] = {
            "method": self.method,
            "order": tables.order,
            "k": self.k if self.method == "addk" else None,
            "closed_vocab": self.closed_vocab,
            "vocab_size": len(tables.vocab),
            "ngrams": self.n_ngrams_,
            "cutoffs": self.cutoffs,
            "prune": self.prune,
            **extra,
        }
        self._checksum = None

    @classmethod
    def from_tables(
        cls, tables: BackoffTables, metadata: dict[str, Any], checksum: str | None = None,
        sentence_hashes: npt.NDArray[np.uint64] | None = None,
    ) -> NGramModel:
        """A fitted model around ready-made tables (a loaded file)."""
        method = str(metadata.get("method", "arpa"))
        model = cls(order=tables.order, method=method if method in METHODS else "mkn",
                    closed_vocab=bool(metadata.get("closed_vocab", False)))
        model.method = method
        k = metadata.get("k")
        model.k = float(k) if isinstance(k, (int, float)) else 1.0
        model.cutoffs = metadata.get("cutoffs")
        model.prune = metadata.get("prune")
        rest = {key: val for key, val in metadata.items()
                if key not in {"method", "order", "k", "closed_vocab", "vocab_size", "ngrams",
                               "cutoffs", "prune"}}
        model._set_fitted(tables, rest)
        model._checksum = checksum
        model.sentence_hashes = sentence_hashes
        return model

    def _fitted(self) -> BackoffTables:
        tables: BackoffTables | None = getattr(self, "tables_", None)
        if tables is None:
            raise UsageError("the model is not fitted; call fit() or load_model() first")
        return tables

    @property
    def unit(self) -> str | None:
        """The token the model was trained on: ``word`` (a native file without the key),
        ``char``, or None for a model read from ARPA text, which does not say."""
        self._fitted()
        unit = self.metadata_.get("unit")
        if unit is not None:
            return str(unit)
        return None if self.method == "arpa" else "word"

    def mark_unit(self, unit: str) -> NGramModel:
        """Record the token unit in the metadata (``word``, the default, is left unsaid
        so word models keep their bytes)."""
        self._fitted()
        if unit != "word":
            self.metadata_["unit"] = unit
            self._checksum = None
        return self

    @property
    def metadata(self) -> dict[str, Any]:
        self._fitted()
        return dict(self.metadata_)

    @property
    def checksum(self) -> str:
        """sha256 of the model's content, equal to the one its native file carries."""
        if self._checksum is None:
            digest = hashlib.sha256()
            for part in content_parts(self._fitted(), self.metadata_, self.extras()):
                digest.update(part)
            self._checksum = digest.hexdigest()
        return self._checksum

    def quantize(self, bits: int) -> NGramModel:
        """Keep the probabilities and back-off weights of every order from 2 as ``bits``-bit
        codes into per-order code books (8 or 16; see :mod:`rescore.lm.quantize`): a smaller,
        lossy model that scores with the book values from now on."""
        tables = quantize(self._fitted(), bits)
        meta = {key: val for key, val in self.metadata_.items()
                if key not in {"method", "order", "k", "closed_vocab", "vocab_size", "ngrams",
                               "cutoffs", "prune"}}
        self._set_fitted(tables, {**meta, "quantized_bits": bits})
        return self

    def extras(self) -> dict[str, npt.NDArray[Any]]:
        """The named arrays a native file stores beside the model (``extra.NAME``)."""
        if self.sentence_hashes is None:
            return {}
        return {"sentence_hashes": self.sentence_hashes}

    # --- scoring --------------------------------------------------------------------------

    def _score(self, sentences: Sequence[Sequence[str]]) -> tuple[F64, Stream, int]:
        """Per-position log-probabilities (NaN where not scored), the stream, OOV count."""
        stream, oov = encode(self._fitted().vocab, sentences)
        return self._score_stream(stream), stream, oov

    def _score_stream(self, stream: Stream) -> F64:
        tables = self._fitted()
        floor = stream.starts[stream.sentence_of]
        logp = tables.score_stream(stream.tokens, floor)
        skip = stream.tokens == BOS_ID
        if self.closed_vocab:
            skip |= stream.tokens == UNK_ID
        logp[skip] = np.nan
        return logp

    def logprob(self, sentences: Sequence[Sequence[str]]) -> F64:
        """Natural-log probability of each whole sentence, ``</s>`` included; shape (n,)."""
        return self.stream_logprob(encode(self._fitted().vocab, sentences)[0])

    def stream_logprob(self, stream: Stream) -> F64:
        """As :meth:`logprob`, for sentences already turned into ids (a
        :class:`~rescore.lm.vocab.Stream` of this model's vocabulary)."""
        logp = self._score_stream(stream)
        scored = ~np.isnan(logp)
        sums = np.bincount(stream.sentence_of[scored], weights=logp[scored],
                           minlength=stream.n_sentences)
        return sums.astype(np.float64)

    def oov_counts(self, sentences: Sequence[Sequence[str]]) -> npt.NDArray[np.int64]:
        """Per sentence, its words outside this model's vocabulary; shape (n,)."""
        return oov_counts(self._fitted().vocab, sentences)

    def token_logprobs(self, sentences: Sequence[Sequence[str]]) -> list[F64]:
        """Per sentence, the natural-log probability of each word and of ``</s>``.

        With a closed vocabulary an out-of-vocabulary word's entry is NaN (not scored).
        """
        logp, stream, _ = self._score(sentences)
        keep = stream.tokens != BOS_ID
        bounds = np.cumsum([len(s) + 1 for s in sentences])[:-1]
        return list(np.split(logp[keep], bounds))

    def logprob_ngrams(self, ngrams: Sequence[Sequence[str]]) -> F64:
        """log P(last word | the words before it) for each n-gram, by the back-off rule.

        ``<s>`` may open the history; a history longer than order - 1 is cut on the left.
        """
        tables = self._fitted()
        index = tables.vocab.index
        width = max((len(g) for g in ngrams), default=1)
        mat = np.full((len(ngrams), width), -1, dtype=np.int64)
        for row, gram in enumerate(ngrams):
            mat[row, width - len(gram):] = [index.get(w, UNK_ID) for w in gram]
        return tables.score_ngrams(mat)

    def __repr__(self) -> str:
        return f"NGramModel(order={self.order}, method={self.method!r})"
