"""A build within a memory budget from counting to the model file, orders kept on disk.

:func:`build_on_disk` counts the text as :func:`rescore.lm.external.count_external` does,
but leaves the merged count tables in the scratch folder: per order ``k >= 2`` the raw
arrays ``suffix{k}``, ``first{k}`` and ``count{k}`` (see :mod:`rescore.lm.counts`). The
estimation of :func:`rescore.lm.backoff.estimate` then runs one order at a time, holding
only what that step uses, and writes each order's probabilities and back-off weights back
to the folder:

- the context of each n-gram of order ``k`` needs the hash table of order ``k - 1`` and
  that order's contexts; order ``k`` is read a block at a time;
- smoothing order ``k`` holds its own counts and numerators whole; its contexts are mapped
  while the method runs and then read a block at a time, as are the suffixes of order
  ``k + 1`` for continuation counts; its probabilities then need the probabilities and
  back-off weights of order ``k - 1`` whole and its own arrays in blocks;
- the native file's index of order ``k`` needs the new ids of order ``k - 1``, then its
  probabilities and weights are put in the index's order, one array at a time.

The model file is written from those arrays in one pass (:func:`rescore.lm.store.save_arrays`,
the same bytes as an in-memory build) into the scratch folder and memory-mapped; the folder
is removed when the build ends, also on an error or an interruption. Every value is
computed by the same numpy operations, on the same operands, as the in-memory estimation
(a sum over contexts a block at a time with ``np.add.at``, which adds in the same order as
``np.bincount``), so the file is byte-identical. Count cutoffs and entropy pruning are
not done here (the caller uses the in-memory estimation for them).
"""

from __future__ import annotations

import itertools
import sys
from collections.abc import Callable, Iterable, Iterator, Sequence
from dataclasses import dataclass
from pathlib import Path
from typing import Any

import numpy as np
import numpy.typing as npt

from rescore.arrays import F64, I64
from rescore.lm import hashindex, rawfiles, store
from rescore.lm.counts import OrderCounts
from rescore.lm.external import (
    Chunked,
    check_memory,
    count_chunks,
    merge_block,
    merge_to_files,
    scratch_folder,
)
from rescore.lm.hashindex import BucketIndex
from rescore.lm.keys import table_keys
from rescore.lm.rawfiles import Shelf, id_type
from rescore.lm.smoothing import (
    ByCount,
    OrderStats,
    Smoother,
    count_histogram,
    of_histogram,
    predictable_tokens,
)
from rescore.lm.tables import BackoffTables
from rescore.lm.vocab import BOS_ID, Vocabulary
from rescore.process import freed_memory_returned, give_back_freed_memory
from rescore.progress import Report, Steps


def streams(cutoffs: Sequence[int] | None, prune: float | None) -> bool:
    """Whether a build with these settings can be estimated on disk: no count cutoff above
    1, no entropy pruning, and a little-endian machine (the raw files are the file's bytes)."""
    return (sys.byteorder == "little" and not (prune is not None and prune > 0)
            and all(c == 1 for c in cutoffs or []))


@dataclass(frozen=True)
class Built:
    """A model built on disk: its tables (a memory-mapped file), the estimation's metadata
    and the training statistics."""

    tables: BackoffTables
    meta: dict[str, Any]
    sentences: int
    words: int
    oov: int


def build_on_disk(sentences: Iterable[Sequence[str]], order: int,
                  choose: Callable[[Sequence[str], I64], Vocabulary], smoother: Smoother, *,
                  closed_vocab: bool, memory: int, scratch: str | Path | None = None,
                  progress: Report | None = None) -> Built:
    """Count ``sentences`` within about ``memory`` bytes and estimate the model with its
    orders on disk under ``scratch`` (see the module's docstring)."""
    check_memory(memory)
    with scratch_folder(scratch, "lm-counts") as folder:
        counted = count_chunks(sentences, order, choose, closed_vocab=closed_vocab,
                               memory=memory, folder=folder, progress=progress)
        shelf = Shelf(folder)
        # from here on the peak is the point: freed temporaries go back to the system
        with freed_memory_returned():
            sizes = _shelve(counted, shelf, memory, progress)
            vocab = counted.vocab
            unigrams = counted.unigrams if counted.whole is None else counted.whole[0].count
            stats = counted.sentences, counted.words, counted.oov
            del counted
            give_back_freed_memory()  # the count tables of a text counted in one piece
            meta = _estimate(shelf, sizes, unigrams, smoother, closed_vocab=closed_vocab,
                             progress=progress)
            tables = _write_model(shelf, sizes, vocab, meta, folder / "model.lm",
                                  Steps(progress, "indexing", order))
    give_back_freed_memory()
    return Built(tables, meta, *stats)


# --- the count tables on disk ----------------------------------------------------------------

def _shelve(counted: Chunked, shelf: Shelf, memory: int, progress: Report | None
            ) -> list[int]:
    """Each order's count table (from 2) on the shelf; the n-grams of each order."""
    v = len(counted.vocab)
    if counted.whole is not None:
        return _shelve_tables(counted.whole, shelf, v)
    sizes = [v]
    codec = counted.codec
    merging = Steps(progress, "merging sorted runs", len(counted.runs))
    for k, runs in enumerate(counted.runs, start=2):
        keys, counts, n = merge_to_files(runs, merge_block(memory, len(runs)),
                                         shelf.folder / f"merged.{k}")
        for run in runs:  # free the disk as soon as an order is merged
            run.keys.unlink()
            run.counts.unlink()
        shelf.adopt(f"count{k}", counts, np.int64, n)
        shelf.adopt(f"keys{k}", keys, codec.dtype(k), n)
        below = codec.unigrams() if k == 2 else shelf.get(f"keys{k - 1}")
        # each n-gram's suffix found among the keys of the order below (as tables_of does)
        with shelf.writer(f"suffix{k}", id_type(sizes[-1])) as suffix, \
                shelf.writer(f"first{k}", id_type(v)) as first:
            for block in shelf.blocks(f"keys{k}"):
                suffix_keys, words = codec.split(block)
                suffix(np.searchsorted(below, suffix_keys))
                first(words)
        del below
        shelf.drop(f"keys{k - 1}")
        sizes.append(n)
        merging()
    shelf.drop(f"keys{codec.order}")
    return sizes


def _shelve_tables(whole: list[OrderCounts], shelf: Shelf, v: int) -> list[int]:
    """Count tables in memory on the shelf, each order let go once written (from 2)."""
    sizes = [v]
    for k in range(2, len(whole) + 1):
        table = whole[k - 1]
        whole[k - 1] = OrderCounts(table.suffix[:0], table.first[:0], table.count[:0])
        shelf.put(f"suffix{k}", table.suffix.astype(id_type(sizes[-1]), copy=False))
        shelf.put(f"first{k}", table.first.astype(id_type(v), copy=False))
        shelf.put(f"count{k}", table.count)
        sizes.append(len(table))
        del table
    return sizes


def estimate_counted(tables: list[OrderCounts], vocab: Vocabulary, smoother: Smoother, *,
                     closed_vocab: bool, scratch: str | Path | None = None,
                     progress: Report | None = None) -> tuple[BackoffTables, dict[str, Any]]:
    """The model of count tables already made (by a cluster), estimated on disk in a
    folder under ``scratch``; ``tables`` is emptied as its orders go to disk."""
    with scratch_folder(scratch, "lm-counts") as folder:
        shelf = Shelf(folder)
        with freed_memory_returned():
            sizes = _shelve_tables(tables, shelf, len(vocab))
            unigrams = tables[0].count
            tables.clear()
            meta = _estimate(shelf, sizes, unigrams, smoother, closed_vocab=closed_vocab,
                             progress=progress)
            built = _write_model(shelf, sizes, vocab, meta, folder / "model.lm",
                                 Steps(progress, "indexing", len(sizes)))
    give_back_freed_memory()
    return built, meta


def _context_name(k: int) -> str:
    """The array of each order-``k`` n-gram's context id (for bigrams: the first word)."""
    return "first2" if k == 2 else f"prefix{k}"


def _order_keys(shelf: Shelf, k: int, v: int,
                new_id: npt.NDArray[Any] | None = None) -> npt.NDArray[np.uint64]:
    """``suffix * V + first`` of every order-``k`` n-gram (suffixes through ``new_id``)."""
    out = np.empty(shelf.length(f"first{k}"), dtype=np.uint64)
    at = 0
    for suffix, first in zip(shelf.blocks(f"suffix{k}"), shelf.blocks(f"first{k}"),
                             strict=True):
        if new_id is not None:
            suffix = new_id[suffix]
        out[at:at + len(first)] = table_keys(suffix, first, v)
        at += len(first)
    return out


def _contexts(shelf: Shelf, sizes: list[int], v: int) -> None:
    """The context id of each n-gram of orders 3 and up (``prefix{k}``), as
    :func:`rescore.lm.backoff._prefixes` finds them."""
    for k in range(3, len(sizes) + 1):
        keys = _order_keys(shelf, k - 1, v)
        slots = hashindex.build_slots(keys)
        below = shelf.get(_context_name(k - 1))
        with shelf.writer(f"prefix{k}", id_type(sizes[k - 2])) as prefix:
            for suffix, first in zip(shelf.blocks(f"suffix{k}"), shelf.blocks(f"first{k}"),
                                     strict=True):
                prefix(hashindex.lookup(slots, keys, table_keys(below[suffix], first, v)))
        del keys, slots, below


# --- the estimation, an order at a time ---------------------------------------------------------

def _continuation(shelf: Shelf, k: int, n: int) -> F64:
    """Continuation counts of order ``k``: how many order-``k + 1`` n-grams extend each."""
    cont = np.zeros(n, dtype=np.int64)
    for suffix in shelf.blocks(f"suffix{k + 1}", 4 * rawfiles.BLOCK):
        cont += np.bincount(suffix, minlength=n)
    return cont.astype(np.float64)


def _estimate(shelf: Shelf, sizes: list[int], unigrams: I64, smoother: Smoother, *,
              closed_vocab: bool, progress: Report | None) -> dict[str, Any]:
    """Smooth every order and write ``prob{k}`` and ``gamma{k}`` (see the module's
    docstring); the same operations as :func:`rescore.lm.backoff.estimate`."""
    order = len(sizes)
    v = sizes[0]
    smoothing = Steps(progress, "smoothing", order + 1)
    _contexts(shelf, sizes, v)
    smoothing()  # the context of every n-gram found
    predictable, n_pred = predictable_tokens(v, closed_vocab)
    meta: dict[str, Any] = {"discounts": {}, "fallbacks": {}}
    for k in range(1, order + 1):
        _smooth(shelf, sizes, k, unigrams, smoother, n_pred, predictable, meta)
        give_back_freed_memory()
        smoothing()
    meta["uniform_tokens"] = n_pred
    return meta


def _smooth(shelf: Shelf, sizes: list[int], k: int, unigrams: I64, smoother: Smoother,
            n_pred: int, predictable: npt.NDArray[np.bool_], meta: dict[str, Any]) -> None:
    """Order ``k``: its back-off weights of order ``k - 1`` (``gamma{k-1}``) and its
    probabilities (``prob{k}``), a block of n-grams at a time for a method that allows it
    (:class:`rescore.lm.smoothing.ByCount`), else whole."""
    if not (k > 1 and isinstance(smoother, ByCount)
            and _smooth_blocks(shelf, sizes, k, smoother, meta)):
        _smooth_whole(shelf, sizes, k, unigrams, smoother, n_pred, predictable, meta)


def _smooth_blocks(shelf: Shelf, sizes: list[int], k: int, smoother: ByCount,
                   meta: dict[str, Any]) -> bool:
    """Order ``k`` (from 2) a block at a time, holding only arrays of its contexts (the
    n-grams of order ``k - 1``) and, below the top order of a continuation method, its
    continuation counts. Three passes over the order's counts: their histogram (the
    method's discounts), the sums per context, then the probabilities. Every value is the
    one :func:`_smooth_whole` computes, by the same operations in the same order. False
    (nothing done) for counts under 1, which counting never gives and which drop their
    n-grams' shares: :func:`_smooth_whole` handles them."""
    order, n_ctx = len(sizes), sizes[k - 2]
    cont = (_continuation(shelf, k, sizes[k - 1])
            if k < order and smoother.continuation else None)

    def counts() -> Iterator[tuple[F64, F64]]:
        """(raw counts, counts the order uses) a block at a time."""
        firsts = (shelf.blocks(f"first{k}") if cont is not None
                  else itertools.repeat(None))
        at = 0
        for raw_counts, first in zip(shelf.blocks(f"count{k}"), firsts, strict=False):
            raw = raw_counts.astype(np.float64)
            used = raw if cont is None else np.where(first == BOS_ID, raw,
                                                     cont[at:at + len(raw)])
            at += len(raw)
            yield raw, used

    hist: npt.NDArray[np.int64] = np.zeros(6, dtype=np.int64)
    for raw, used in counts():
        hist += count_histogram(used)
        if (raw < 1).any():
            return False
    form = smoother.per_ngram(of_histogram(hist))
    if form.discounts:
        meta["discounts"][str(k)] = [round(d, 12) for d in form.discounts]
    if form.fallback:
        meta["fallbacks"][str(k)] = form.fallback

    denom = np.zeros(n_ctx)  # sum of the used counts, then the denominator
    mass = np.zeros(n_ctx)  # sum of used - numerator, then the back-off weight
    extra = None if form.extra_term is None else np.zeros(n_ctx)
    for (_, used), ctx in zip(counts(), shelf.blocks(_context_name(k)), strict=True):
        numer = form.numer(used)
        np.add.at(denom, ctx, used)
        if extra is not None and form.extra_term is not None:
            np.add.at(extra, ctx, form.extra_term(used))
        np.subtract(used, numer, out=numer)
        np.add.at(mass, ctx, numer)
    # as _smooth_whole: denom + extra, extra + mass + lost (nothing is lost here); with no
    # extra the scalar 0.0 added gives the bits that adding an array of zeros gives
    denom += 0.0 if extra is None else extra
    np.add(0.0 if extra is None else extra, mass, out=mass)
    mass += 0.0
    del extra
    positive = denom > 0
    safe = denom
    safe[~positive] = 1.0
    gamma = np.divide(mass, safe, out=mass)
    gamma[~positive] = 1.0
    shelf.put(f"gamma{k - 1}", gamma)
    below = shelf.get(f"prob{k - 1}")
    with shelf.writer(f"prob{k}", np.float64) as prob:
        for (_, used), ctx, suffix in zip(counts(), shelf.blocks(_context_name(k)),
                                          shelf.blocks(f"suffix{k}"), strict=True):
            numer = form.numer(used)
            alpha = np.where(positive[ctx], numer / safe[ctx], 0.0)
            out = gamma[ctx]
            out *= below[suffix]
            out += alpha
            prob(out)
    del gamma, below, safe, positive
    give_back_freed_memory()
    shelf.drop(f"count{k}", *([f"prefix{k}"] if k > 2 else []))
    return True


def _smooth_whole(shelf: Shelf, sizes: list[int], k: int, unigrams: I64, smoother: Smoother,
                  n_pred: int, predictable: npt.NDArray[np.bool_], meta: dict[str, Any]
                  ) -> None:
    """Order ``k`` with its counts and numerators held whole; the contexts are mapped
    while the method runs (one that does not read them holds none of them), then read a
    block at a time."""
    order, v, n = len(sizes), sizes[0], sizes[k - 1]
    raw = (unigrams if k == 1 else shelf.get(f"count{k}")).astype(np.float64)
    first = np.arange(v) if k == 1 else None
    if k == order or not smoother.continuation:
        used = raw.copy() if k == 1 else raw
    else:
        cont = _continuation(shelf, k, n)
        if first is None:
            first = shelf.get(f"first{k}")
        used = np.where(first == BOS_ID, raw, cont)
        del cont
    prefix: npt.NDArray[Any]
    full: npt.NDArray[np.bool_]
    if k == 1:
        used[BOS_ID] = 0.0
        prefix = np.zeros(v, dtype=np.int32)
        full = np.full(v, order == 1)
    else:
        prefix = shelf.mapped(_context_name(k))
        if k == order:  # every context a whole history: one value, no array
            full = np.broadcast_to(np.True_, (n,))
        else:
            if first is None:
                first = shelf.get(f"first{k}")
            full = first == BOS_ID
    del first
    n_ctx = 1 if k == 1 else sizes[k - 2]
    stats = OrderStats(k, used, prefix, n_ctx, full, n_pred)
    del full
    est = smoother.estimate(stats)
    if k > 1:  # from here on the contexts are read a block at a time
        del stats, prefix
    give_back_freed_memory()  # the method's temporaries

    def per_context(values: F64) -> F64:
        if k == 1:
            return np.bincount(np.zeros(v, np.intp), weights=values, minlength=1
                               ).astype(np.float64)
        return _per_context(shelf, _context_name(k), values, n_ctx)

    if est.discounts:
        meta["discounts"][str(k)] = [round(d, 12) for d in est.discounts]
    if est.fallback:
        meta["fallbacks"][str(k)] = est.fallback
    dropped = raw < 1
    del raw
    if dropped.any():
        numer = np.where(dropped, 0.0, est.numer)
        lost = per_context(est.numer - numer)
    else:  # the same values: nothing is dropped, no share is lost
        numer, lost = est.numer, np.zeros(n_ctx)
    del dropped
    denom = per_context(used) + est.extra
    np.subtract(used, est.numer, out=used)  # used - numer, in place (used is not needed again)
    mass = est.extra + per_context(used) + lost
    del used, lost, est
    safe = np.where(denom > 0, denom, 1.0)
    gamma = np.where(denom > 0, mass / safe, 1.0)
    del mass
    if k == 1:
        alpha = np.where(denom[0] > 0, numer / safe[0], 0.0)  # one context: all of them
        p1 = alpha + float(gamma[0]) / n_pred
        p1[~predictable] = 0.0
        shelf.put("prob1", p1)
        return
    shelf.put(f"gamma{k - 1}", gamma)
    del gamma
    with shelf.writer(f"alpha{k}", np.float64) as add:
        at = 0
        for ctx in shelf.blocks(_context_name(k)):
            add(np.where(denom[ctx] > 0, numer[at:at + len(ctx)] / safe[ctx], 0.0))
            at += len(ctx)
    del numer, denom, safe
    give_back_freed_memory()
    _probabilities(shelf, k)
    # the disk of what no later step reads: the counts, and the contexts from order 3
    shelf.drop(f"count{k}", *([f"prefix{k}"] if k > 2 else []))


def _per_context(shelf: Shelf, contexts: str, values: F64, n_ctx: int) -> F64:
    """The sum of ``values`` over each context, the contexts read a block at a time: the
    same additions in the same order as ``np.bincount(contexts, weights=values)`` (each
    sum starts at 0 and adds its values in index order), so the same bits."""
    sums = np.zeros(n_ctx, dtype=np.float64)
    at = 0
    for ctx in shelf.blocks(contexts):
        np.add.at(sums, ctx, values[at:at + len(ctx)])
        at += len(ctx)
    return sums


def _probabilities(shelf: Shelf, k: int) -> None:
    """``prob{k}``: each n-gram's own share plus its context's weight times the
    probability of its suffix, a block at a time."""
    gamma, below = shelf.get(f"gamma{k - 1}"), shelf.get(f"prob{k - 1}")
    with shelf.writer(f"prob{k}", np.float64) as prob:
        for ctx, suffix, alpha in zip(shelf.blocks(_context_name(k)),
                                      shelf.blocks(f"suffix{k}"), shelf.blocks(f"alpha{k}"),
                                      strict=True):
            out = gamma[ctx]
            out *= below[suffix]
            out += alpha
            prob(out)
    shelf.drop(f"alpha{k}")


# --- the native file ---------------------------------------------------------------------------

def _write_model(shelf: Shelf, sizes: list[int], vocab: Vocabulary, meta: dict[str, Any],
                 path: Path, tick: Steps) -> BackoffTables:
    """Index every order as the native file does, put its values in the index's order,
    write the file and map it."""
    order = len(sizes)
    v = sizes[0]
    words = "\n".join(vocab.words).encode("utf-8")
    arrays: list[tuple[str, Any]] = [("vocab", np.frombuffer(words, np.uint8))]
    index: list[dict[str, int]] = []

    def log_of(name: str, perm: npt.NDArray[Any] | None) -> None:
        """The natural log of the array ``name`` in the index's order (``perm``), written
        a block at a time: the values are held whole, the result a block of it."""
        values = shelf.get(name)
        out = name.replace("prob", "logp").replace("gamma", "bow")
        with shelf.writer(out, np.float64) as add, np.errstate(divide="ignore"):
            for lo in range(0, len(values), rawfiles.BLOCK):
                block = (values[lo:lo + rawfiles.BLOCK].copy() if perm is None
                         else values[perm[lo:lo + rawfiles.BLOCK]])
                add(np.log(block, out=block))
        del values
        shelf.drop(name)
        arrays.append((out, shelf.entry(out)))

    log_of("prob1", None)
    if order > 1:
        log_of("gamma1", None)
    tick()
    new_id: npt.NDArray[Any] | None = None  # the index's position of each id of the order below
    for k in range(2, order + 1):
        n = sizes[k - 1]
        keys = _order_keys(shelf, k, v, new_id)
        del new_id
        shelf.drop(f"suffix{k}", f"first{k}", f"count{k}", f"prefix{k}")
        idx, perm = BucketIndex.build(keys, sizes[k - 2] * v, overwrite=True)
        del keys
        index.append({"order": k, "bits": idx.bits, "shift": idx.shift})
        for part, values in (("start", idx.starts), ("rest", idx.rest)):
            shelf.put(f"{part}{k}", values)
            arrays.append((f"{part}{k}", shelf.entry(f"{part}{k}")))
        del idx
        log_of(f"prob{k}", perm)
        if k < order:
            log_of(f"gamma{k}", perm)
            new_id = np.empty(n, dtype=id_type(n))
            new_id[perm] = np.arange(n, dtype=new_id.dtype)
        else:
            new_id = None
        del perm
        give_back_freed_memory()
        tick()
    store.save_arrays(arrays, index, {**meta, "ngrams": sizes}, path)
    for name, _ in arrays[1:]:
        shelf.drop(name)
    return store.load_file(path).tables
