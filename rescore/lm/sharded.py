"""Counting the n-grams of a corpus on a Dask cluster: shards counted on the workers, merged.

The text files are cut into byte ranges at line starts (a gzip file is one shard). Each
worker reads its shard, normalises it as :func:`rescore.lm.read_corpus` does, and counts
it with :func:`count_ngrams` over the shard's own word ids, keeping the tables in its
memory. The words and their counts, gathered from every shard, fix the vocabulary exactly
as one pass over the whole text does. Each worker then maps its n-grams to the model's
ids (an out-of-vocabulary word becomes ``<unk>``; with a closed vocabulary an n-gram that
holds one is dropped, as the in-memory windows that stop at an unknown word drop it),
sorts and sums them, and sends them back; each shard is one sorted run in the scratch
folder, and the runs are merged as in :mod:`rescore.lm.external`. The tables equal those
of one in-memory count, so the model is byte-identical to a local build.
"""

from __future__ import annotations

import os
from collections.abc import Callable, Sequence
from dataclasses import dataclass
from pathlib import Path
from typing import Any

import numpy as np
import numpy.typing as npt

from rescore.cluster import LOCAL, dask_client, worker_count
from rescore.compression import is_gzip_file
from rescore.errors import InputError, RescoreError, UsageError
from rescore.lm import fingerprint
from rescore.lm.counts import OrderCounts, count_ngrams, window_floor
from rescore.lm.external import (
    CorpusCounts,
    Run,
    merge_all,
    scratch_folder,
    sum_duplicates,
    write_run,
)
from rescore.lm.fingerprint import Recorder
from rescore.lm.keys import KeyCodec, Keys
from rescore.lm.vocab import (
    EOS_ID,
    SPECIALS,
    UNK_ID,
    Vocabulary,
    first_pass,
    remap,
    stream_from_lengths,
)
from rescore.progress import Report, Steps
from rescore.readers import iter_text_lines
from rescore.shards import line_shards
from rescore.spool import local
from rescore.text import tokens

I32 = npt.NDArray[np.int32]
I64 = npt.NDArray[np.int64]

MIN_SHARD_BYTES = 1 << 20  # smaller shards cost more in scheduling than they save
MAX_SHARD_BYTES = 32 << 20  # about 1 GB of a worker's memory while it counts the shard
SHARDS_PER_WORKER = 4


@dataclass(frozen=True)
class TextShard:
    """Lines ``start``..``end`` (bytes; ``end`` None: to the end) of one text file."""

    path: str  # absolute, as the workers open it
    display: str  # as the user named it, for messages
    start: int
    end: int | None
    first_line: int


@dataclass(frozen=True)
class ShardCounts:
    """One shard counted over its own word ids (kept on the worker that made it)."""

    words: list[str]  # the shard's words; ids 0..2 are the reserved tokens
    word_counts: I64  # occurrences in the text (the literal reserved words at 0..2)
    sentences: int
    tokens: int
    tables: list[OrderCounts]
    sentence_hashes: npt.NDArray[np.uint64]  # the shard's part of the fingerprint


@dataclass(frozen=True)
class ShardRun:
    """A shard's n-grams in the model's ids: dense unigram counts, then per order from 2
    the sorted distinct keys and their counts."""

    unigrams: I64
    keys: list[Keys]
    counts: list[I64]


def plan_shards(paths: Sequence[str | Path], parts: int, min_bytes: int = MIN_SHARD_BYTES
                ) -> list[TextShard]:
    """Byte-range shards of every file: about ``parts`` over the whole text, each of at
    least ``min_bytes`` and at most :data:`MAX_SHARD_BYTES` (a gzip file is one shard)."""
    sizes = []
    for p in paths:
        try:
            sizes.append(local(p).stat().st_size)
        except FileNotFoundError:
            raise InputError("file not found", path=p) from None
    total = max(sum(sizes), 1)
    shards: list[TextShard] = []
    for p, size in zip(paths, sizes, strict=True):
        full = str(local(p).resolve())
        if Path(p).is_dir():
            raise InputError("is a folder, expected a file", path=p)
        if is_gzip_file(p):
            shards.append(TextShard(full, str(p), 0, None, 1))
            continue
        want = max(1, round(parts * size / total), -(-size // MAX_SHARD_BYTES))
        for a, b, first in line_shards(p, want, min_bytes):
            shards.append(TextShard(full, str(p), a, b, first))
    return shards


def count_shard(shard: TextShard, order: int) -> ShardCounts | RescoreError:
    """Read, normalise and count one shard (runs on a worker). Bad input comes back as the
    error itself, raised in the main process: a task that fails makes every worker log a
    traceback, and the contract is one line."""
    def sentences() -> Any:
        for _, line in iter_text_lines(shard.path, start=shard.start, end=shard.end,
                                       first_line=shard.first_line):
            words = tokens(line)
            if words:
                yield words

    recorder = Recorder(sentences())
    try:
        words, counts, body, lengths = first_pass(recorder)
    except RescoreError as exc:
        exc.path = shard.display
        return exc
    # the literal reserved words in text are unknown words, not sentence marks
    body[body <= EOS_ID] = UNK_ID
    stream = stream_from_lengths(body, lengths)
    tables = count_ngrams(stream.tokens, window_floor(stream, False), order, len(words))
    return ShardCounts(words, counts, len(lengths), len(body), tables, recorder.result())


def shard_words(counted: ShardCounts | RescoreError
                ) -> tuple[list[str], I64, int, int, npt.NDArray[np.uint64]] | RescoreError:
    """What the vocabulary needs of a shard: words, counts, sentences, tokens (and the
    shard's sentence hashes, for the model's fingerprint)."""
    if isinstance(counted, RescoreError):
        return counted
    return (counted.words, counted.word_counts, counted.sentences, counted.tokens,
            counted.sentence_hashes)


def shard_run(counted: ShardCounts, vocab_words: str, closed_vocab: bool) -> ShardRun:
    """The shard's n-grams in the model's ids, sorted and summed (runs on a worker).

    ``vocab_words`` is the model's words joined by newlines (a normalised word holds no
    white space): one string crosses to the workers in a few milliseconds, where a tuple
    of 50,000 words took seconds to scatter."""
    index = {w: i for i, w in enumerate(vocab_words.split("\n"))}
    table = np.fromiter((index.get(w, UNK_ID) for w in counted.words), dtype=np.int32,
                        count=len(counted.words))
    table[:len(SPECIALS)] = np.arange(len(SPECIALS))  # the marks, and <unk> itself
    v = len(index)
    order = len(counted.tables)
    codec = KeyCodec(order, v)
    unigrams = np.zeros(v, dtype=np.int64)
    np.add.at(unigrams, table, counted.tables[0].count)
    if closed_vocab:
        unigrams[UNK_ID] = 0
    keys: list[Keys] = []
    counts: list[I64] = []
    words = np.arange(len(counted.words), dtype=np.int32)[:, None]  # rows w1..wk, local ids
    for k in range(2, order + 1):
        t = counted.tables[k - 1]
        words = np.column_stack([t.first.astype(np.int32), words[t.suffix]])
        mapped = table[words]
        c = t.count
        if closed_vocab:
            keep = ~(mapped == UNK_ID).any(axis=1)
            mapped, c = mapped[keep], c[keep]
        k_keys, k_counts = sum_duplicates(codec.from_words(mapped), c)
        keys.append(k_keys)
        counts.append(k_counts)
    return ShardRun(unigrams, keys, counts)


def count_on_cluster(
    paths: Sequence[str | Path],
    order: int,
    choose: Callable[[Sequence[str], I64], Vocabulary],
    *,
    closed_vocab: bool,
    cluster: str,
    memory: int,
    scratch: str | Path | None = None,
    workers: int | None = None,
    min_shard_bytes: int = MIN_SHARD_BYTES,
    progress: Report | None = None,
) -> CorpusCounts:
    """Count the text files ``paths`` on the Dask cluster at ``cluster`` (an address, or
    ``"local"`` for ``workers`` processes on this machine, default one per core), merging
    the shards' runs within about ``memory`` bytes in a folder under ``scratch``."""
    n_local = workers if workers is not None else (os.cpu_count() or 1)
    with scratch_folder(scratch, "lm-shards") as folder, \
            dask_client(cluster, n_local) as client:
        n_workers = n_local if cluster == LOCAL else worker_count(client)
        shards = plan_shards(paths, SHARDS_PER_WORKER * n_workers, min_shard_bytes)
        counting = Steps(progress, "counting shards on the cluster", 2 * len(shards))
        counted = client.map(count_shard, shards, order=order, pure=False)
        try:
            merged: dict[str, int] = dict.fromkeys(SPECIALS, 0)
            sentences = n_tokens = 0
            hash_parts: list[npt.NDArray[np.uint64]] = []
            for future in client.map(shard_words, counted, pure=False):
                got = future.result()
                if isinstance(got, RescoreError):
                    raise got
                words, counts, s, n, shard_hashes = got
                hash_parts.append(shard_hashes)
                for w, c in zip(words, counts.tolist(), strict=True):
                    merged[w] = merged.get(w, 0) + c
                sentences += s
                n_tokens += n
                counting()
            if not sentences:
                raise InputError("no sentences (every line is blank or has no words)",
                                 path=", ".join(str(p) for p in paths) or None)
            all_words = list(merged)
            all_counts = np.fromiter(merged.values(), dtype=np.int64, count=len(merged))
            vocab = choose(all_words, all_counts)
            if any("\n" in w for w in vocab.words):
                raise UsageError("a vocabulary word holds a line break; no text word can")
            oov = int(all_counts[remap(all_words, vocab) == UNK_ID].sum())
            shared = client.scatter("\n".join(vocab.words), broadcast=True)
            codec = KeyCodec(order, len(vocab))
            unigrams = np.zeros(len(vocab), dtype=np.int64)
            runs: list[list[Run]] = [[] for _ in range(order - 1)]
            mapped = client.map(shard_run, counted, vocab_words=shared,
                                closed_vocab=closed_vocab, pure=False)
            for j, future in enumerate(mapped):
                result: ShardRun = future.result()
                client.cancel([future, counted[j]])  # the worker's memory is free again
                unigrams += result.unigrams
                for k, (k_keys, k_counts) in enumerate(zip(result.keys, result.counts,
                                                           strict=True), start=2):
                    runs[k - 2].append(write_run(folder, f"shard{j:05d}.{k}", k_keys,
                                                 k_counts))
                del result
                counting()
        finally:
            client.cancel(counted)
        tables = merge_all(codec, unigrams, runs, memory, progress)
    return CorpusCounts(vocab, tables, sentences, n_tokens, oov, len(shards),
                        fingerprint.union(hash_parts))
