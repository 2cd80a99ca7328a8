"""Counting the n-grams of a corpus larger than memory: sorted runs on disk, then merged.

The text is read once. Each word gets a provisional id on first sight; the ids and each
sentence's length go to a scratch folder while the words' counts are added up, which fixes
the vocabulary exactly as an in-memory build does. The id stream is then counted chunk by
chunk, each chunk small enough for the memory budget, by the same :func:`count_ngrams`.
Chunks end at sentence ends, and no n-gram crosses a sentence, so the counts of the whole
text are the sums of the chunks' counts. Each order's distinct n-grams of a chunk are
written as one sorted run: keys of their word ids (raw arrays, no pickle) and
counts. The runs of each order are merged block by block, and each n-gram's suffix id is
found by binary search among the merged keys of the order below, which gives the tables of
:func:`count_ngrams` over the whole stream, so the model is byte-identical.

A key orders n-grams as the tables do (reversed lexicographic order of the word ids): when
``order * bits(V)`` fits in 64 bits it packs the words into one uint64 (last word in the
high bits), otherwise it is a byte string of the word ids as big-endian uint32, last word
first, which numpy sorts and searches byte by byte.
"""

from __future__ import annotations

import contextlib
import dataclasses
import errno
import os
import re
import shutil
import tempfile
from collections import defaultdict
from collections.abc import Callable, Iterable, Iterator, Sequence
from dataclasses import dataclass
from itertools import chain, islice
from pathlib import Path
from typing import Any, BinaryIO

import numpy as np
import numpy.typing as npt

from rescore.errors import InputError, UsageError
from rescore.leftovers import TMP_PREFIX, remove_stale_temporaries
from rescore.lm.counts import OrderCounts, count_ngrams, window_floor
from rescore.lm.keys import KeyCodec, Keys
from rescore.lm.vocab import SPECIALS, UNK_ID, Vocabulary, remap, stream_from_lengths
from rescore.process import freed_memory_returned, give_back_freed_memory
from rescore.progress import Report, Steps

I32 = npt.NDArray[np.int32]
I64 = npt.NDArray[np.int64]

# Peak bytes of memory per token of a chunk while count_ngrams counts a 4-gram (the padded
# stream, its sentence index and floors, the window keys and their runs), measured on the
# 10-million-word Zipfian text of scripts/bench_lm.py: 1.6 GB for 10 M tokens, 0.35 GB for
# 2 M. A chunk takes at most COUNTING_SHARE of the budget; the rest is for the process
# itself, the merge's blocks (a fifth of the budget) and the estimation on disk, whose
# arrays of one order at a time (about 1.1 GB above the process at 60 million words of
# that text) should stay under counting's peak (scripts/bench_corpus.py --stages).
BYTES_PER_TOKEN = 180
COUNTING_SHARE = 0.45
MIN_CHUNK_TOKENS = 1 << 8
SENTENCES_PER_BLOCK = 1 << 14  # sentences tokenised between two writes of the first pass
MIN_MEMORY = 64 << 10  # tiny budgets are for tests: many runs from a small text
MIN_DEFAULT_MEMORY = 64 << 20
DEFAULT_MEMORY_SHARE = 0.5
_SIZE = re.compile(r"\s*(\d+(?:\.\d+)?)\s*([kmgt]?)(?:i?b)?\s*", re.IGNORECASE)
_UNITS = {"": 1, "k": 1 << 10, "m": 1 << 20, "g": 1 << 30, "t": 1 << 40}


def parse_size(text: str) -> int:
    """Bytes in ``text``: a number with an optional unit K, M, G or T (powers of 1024),
    e.g. ``4G``, ``500M``, ``1.5g``, ``2GiB``; a bare number is bytes."""
    match = _SIZE.fullmatch(text)
    if match is None:
        raise UsageError(f"memory size {text!r} is not a number with an optional unit "
                         "K, M, G or T (e.g. 4G, 500M)")
    return int(float(match.group(1)) * _UNITS[match.group(2).lower()])


def available_memory() -> int | None:
    """The kernel's estimate of memory available to a new process (Linux), else None."""
    try:
        with open("/proc/meminfo", encoding="ascii") as fh:
            for line in fh:
                if line.startswith("MemAvailable:"):
                    return int(line.split()[1]) * 1024
    except (OSError, ValueError, IndexError):
        pass
    return None


def default_memory() -> int:
    """The budget when none is given: half the memory available at the start (Linux's
    MemAvailable), else half the physical memory, and never under 64 MiB."""
    avail = available_memory()
    if avail is None:
        try:
            avail = os.sysconf("SC_PAGE_SIZE") * os.sysconf("SC_PHYS_PAGES")
        except (ValueError, OSError, AttributeError):
            avail = 4 << 30
    return max(MIN_DEFAULT_MEMORY, int(avail * DEFAULT_MEMORY_SHARE))


def chunk_tokens(memory: int) -> int:
    """Tokens of the padded stream counted at once under a budget of ``memory`` bytes."""
    return max(MIN_CHUNK_TOKENS, int(memory * COUNTING_SHARE) // BYTES_PER_TOKEN)


@dataclass(frozen=True)
class CorpusCounts:
    """What counting a corpus gives the estimator: the vocabulary, every order's table and
    the training statistics recorded in the model's metadata."""

    vocab: Vocabulary
    tables: list[OrderCounts]
    sentences: int
    words: int
    oov: int
    runs: int  # sorted runs written to disk (0: counted in memory in one piece)
    # the fingerprint of the training sentences (see rescore.lm.fingerprint); None: not taken
    sentence_hashes: npt.NDArray[np.uint64] | None = None


# --- the scratch folder ---------------------------------------------------------------------

_FULL_DISK = (errno.ENOSPC, errno.EDQUOT)


@contextlib.contextmanager
def scratch_folder(parent: str | Path | None, purpose: str) -> Iterator[Path]:
    """A private folder under ``parent`` (default: the system's temporary folder), removed
    with everything in it however the block ends (an error, Ctrl-C, or SIGTERM turned into
    an exception). A full disk becomes one :class:`InputError` naming the folder. Folders
    of the same purpose left by a killed build (their process is gone) are removed first."""
    base = Path(tempfile.gettempdir() if parent is None else parent)
    if base.is_dir():
        remove_stale_temporaries(base, purpose)
    try:
        folder = Path(tempfile.mkdtemp(prefix=f"{TMP_PREFIX}{purpose}.{os.getpid()}.",
                                       dir=base))
    except FileNotFoundError:
        raise InputError("scratch folder not found", path=base) from None
    except NotADirectoryError:
        raise InputError("scratch path is not a folder", path=base) from None
    except PermissionError:
        raise InputError("permission denied for the scratch folder", path=base) from None
    try:
        yield folder
    except OSError as exc:
        if exc.errno in _FULL_DISK:
            raise InputError(
                "no space left on device for the counting runs; free some space or choose "
                "a scratch folder on a larger disk", path=base) from None
        raise
    finally:
        shutil.rmtree(folder, ignore_errors=True)


def sum_duplicates(keys: Keys, counts: I64) -> tuple[Keys, I64]:
    """Sorted distinct keys and the sum of the counts of each."""
    if not len(keys):
        return keys, counts
    perm = np.argsort(keys, kind="stable")
    keys, counts = keys[perm], counts[perm]
    flag = np.empty(len(keys), dtype=bool)
    flag[0] = True
    np.not_equal(keys[1:], keys[:-1], out=flag[1:])
    starts = np.flatnonzero(flag)
    return keys[starts], np.add.reduceat(counts, starts)


# --- runs on disk ----------------------------------------------------------------------------

@dataclass(frozen=True)
class Run:
    """One sorted run of one order: distinct keys and their counts, two raw files."""

    keys: Path
    counts: Path
    length: int
    dtype: np.dtype[Any]


def _create(path: Path) -> BinaryIO:
    """A new scratch file (the one place they are opened, so a test can fill the disk)."""
    return open(path, "xb")


def _write(fh: BinaryIO, array: npt.NDArray[Any]) -> None:
    # file.write, not ndarray.tofile: tofile reports a full disk as an OSError without errno
    fh.write(np.ascontiguousarray(array).data.cast("B"))


def write_run(folder: Path, name: str, keys: Keys, counts: I64) -> Run:
    run = Run(folder / f"{name}.keys", folder / f"{name}.counts", len(keys), keys.dtype)
    with _create(run.keys) as fh:
        _write(fh, keys)
    with _create(run.counts) as fh:
        _write(fh, counts.astype(np.int64, copy=False))
    return run


class _Reader:
    """A run read block by block (explicit reads, so nothing stays mapped in memory)."""

    def __init__(self, run: Run, block: int) -> None:
        self.run = run
        self.block = block
        self.pos = 0  # entries read from the files
        self.keys: Keys = np.zeros(0, dtype=run.dtype)
        self.counts: I64 = np.zeros(0, dtype=np.int64)

    @property
    def more_on_disk(self) -> bool:
        return self.pos < self.run.length

    def refill(self) -> None:
        if len(self.keys) or not self.more_on_disk:
            return
        n = min(self.block, self.run.length - self.pos)
        self.keys = np.fromfile(self.run.keys, dtype=self.run.dtype, count=n,
                                offset=self.pos * self.run.dtype.itemsize)
        self.counts = np.fromfile(self.run.counts, dtype=np.int64, count=n,
                                  offset=self.pos * 8)
        self.pos += n

    def take_through(self, cut: Any | None) -> tuple[Keys, I64]:
        """The buffered entries with keys up to ``cut`` (all of them when None)."""
        n = len(self.keys) if cut is None else int(np.searchsorted(self.keys, cut, "right"))
        out = self.keys[:n], self.counts[:n]
        self.keys, self.counts = self.keys[n:], self.counts[n:]
        return out


def merge_runs(runs: Sequence[Run], block: int, spill: Path | None = None
               ) -> tuple[Keys, I64]:
    """The distinct keys of all ``runs`` (each sorted and distinct) and their summed counts.

    With ``spill`` (a path without suffix in a scratch folder), each step's output goes to
    ``spill.keys`` and ``spill.counts`` and the result is read back in one piece at the
    end, so the merge never holds its pieces and their concatenation at once.

    Each step takes, from every run's buffer, the entries up to the smallest last buffered
    key among the runs that have more on disk: no later entry of any run can sort before
    it, so each step's keys are complete and follow the previous step's.
    """
    readers = [_Reader(r, block) for r in runs]
    out_keys: list[Keys] = []
    out_counts: list[I64] = []
    dtype = runs[0].dtype if runs else np.dtype(np.uint64)
    if spill is not None:
        keys_path, counts_path, _ = merge_to_files(runs, block, spill)
        try:
            return np.fromfile(keys_path, dtype=dtype), np.fromfile(counts_path, dtype=np.int64)
        finally:
            keys_path.unlink()
            counts_path.unlink()
    for keys, counts in _merge_steps(readers):
        out_keys.append(keys)
        out_counts.append(counts)
    if not out_keys:
        return np.zeros(0, dtype=dtype), np.zeros(0, dtype=np.int64)
    return np.concatenate(out_keys), np.concatenate(out_counts)


def _merge_steps(readers: list[_Reader]) -> Iterator[tuple[Keys, I64]]:
    """The merge's steps (see :func:`merge_runs`), each complete and in order."""
    while True:
        for r in readers:
            r.refill()
        live = [r for r in readers if len(r.keys)]
        if not live:
            return
        bounds = [r.keys[-1] for r in live if r.more_on_disk]
        cut = min(bounds) if bounds else None
        pieces = [r.take_through(cut) for r in live]
        yield sum_duplicates(np.concatenate([p[0] for p in pieces]),
                             np.concatenate([p[1] for p in pieces]))


def merge_to_files(runs: Sequence[Run], block: int, spill: Path) -> tuple[Path, Path, int]:
    """As :func:`merge_runs` with ``spill``, left on disk: the files of the merged keys
    and counts (int64), and their length."""
    keys_path, counts_path = spill.with_suffix(".keys"), spill.with_suffix(".counts")
    n = 0
    with _create(keys_path) as fk, _create(counts_path) as fc:
        for keys, counts in _merge_steps([_Reader(r, block) for r in runs]):
            _write(fk, keys)
            _write(fc, counts)
            n += len(keys)
    return keys_path, counts_path, n


def merge_block(memory: int, runs: int) -> int:
    """Entries read from each run at a time: a fifth of the budget over all runs' buffers
    and their concatenation (about 40 bytes an entry with the sort's temporaries)."""
    return max(1 << 12, int(memory * 0.2) // (40 * max(runs, 1)))


# --- the first pass: provisional ids to disk --------------------------------------------------

@dataclass(frozen=True)
class _FirstPass:
    words: list[str]
    counts: I64
    ids: Path
    lengths: I64
    tokens: int


def _first_pass_to_disk(sentences: Iterable[Sequence[str]], folder: Path) -> _FirstPass:
    """As :func:`rescore.lm.vocab.first_pass`, but the id body goes to ``folder/ids``."""
    provisional: defaultdict[str, int] = defaultdict()
    provisional.default_factory = provisional.__len__  # a new word gets the next id
    for special in SPECIALS:
        provisional[special]
    counts = np.zeros(0, dtype=np.int64)
    lengths: list[I64] = []
    tokens = 0
    source = iter(sentences)
    path = folder / "ids"
    with _create(path) as fh:
        while block := list(islice(source, SENTENCES_PER_BLOCK)):
            lens = np.fromiter(map(len, block), dtype=np.int64, count=len(block))
            n = int(lens.sum())
            ids = np.fromiter(map(provisional.__getitem__, chain.from_iterable(block)),
                              dtype=np.int32, count=n)
            _write(fh, ids)
            grown = np.bincount(ids, minlength=len(provisional))
            grown[:len(counts)] += counts
            counts = grown
            lengths.append(lens)
            tokens += n
    counts = np.pad(counts, (0, len(provisional) - len(counts)))
    return _FirstPass(list(provisional), counts.astype(np.int64), path,
                      np.concatenate(lengths) if lengths else np.zeros(0, np.int64), tokens)


def count_external(
    sentences: Iterable[Sequence[str]],
    order: int,
    choose: Callable[[Sequence[str], I64], Vocabulary],
    *,
    closed_vocab: bool,
    memory: int,
    scratch: str | Path | None = None,
    progress: Report | None = None,
) -> CorpusCounts:
    """Count ``sentences`` within about ``memory`` bytes, spilling runs to ``scratch``.

    ``choose(words, counts)`` picks the vocabulary from the provisional words and their
    counts (as ``NGramModel.fit`` does). When the whole stream fits in one chunk, it is
    counted in memory and no run is written.
    """
    check_memory(memory)
    with scratch_folder(scratch, "lm-counts") as folder:
        c = count_chunks(sentences, order, choose, closed_vocab=closed_vocab, memory=memory,
                         folder=folder, progress=progress)
        whole = c.whole if c.whole is not None else merge_all(c.codec, c.unigrams, c.runs,
                                                               memory, progress)
    return CorpusCounts(c.vocab, whole, c.sentences, c.words, c.oov, c.chunks)


def check_memory(memory: int) -> None:
    if memory < MIN_MEMORY:
        raise UsageError(f"the memory budget must be at least {MIN_MEMORY >> 10} KiB, "
                         f"got {memory} bytes")


@dataclass(frozen=True)
class Chunked:
    """A text counted in chunks: the whole tables (one chunk), or each order's sorted runs
    in the scratch folder and the unigram counts (``chunks``: 0 for one chunk)."""

    vocab: Vocabulary
    codec: KeyCodec
    unigrams: I64
    runs: list[list[Run]]
    whole: list[OrderCounts] | None
    sentences: int
    words: int
    oov: int
    chunks: int


def count_chunks(sentences: Iterable[Sequence[str]], order: int,
                 choose: Callable[[Sequence[str], I64], Vocabulary], *, closed_vocab: bool,
                 memory: int, folder: Path, progress: Report | None) -> Chunked:
    """The counting of :func:`count_external` in ``folder``, before any merge."""
    first = _first_pass_to_disk(sentences, folder)
    vocab = choose(first.words, first.counts)
    table = remap(first.words, vocab)
    oov = int(first.counts[table == UNK_ID].sum())
    v = len(vocab)
    ends = np.cumsum(first.lengths + 2)  # the end of each padded sentence in the stream
    limit = chunk_tokens(memory)
    # chunk j holds the sentences before cuts[j + 1]; each at least one sentence
    cuts = [0] if len(ends) else [0, 0]
    while cuts[-1] < len(ends):
        start = 0 if cuts[-1] == 0 else int(ends[cuts[-1] - 1])
        nxt = int(np.searchsorted(ends, start + limit, "right"))
        cuts.append(max(nxt, cuts[-1] + 1))
    n_chunks = len(cuts) - 1
    # where each chunk's words start in the id file: its padded start less two per sentence
    # (only these are kept: arrays of every sentence are the part of counting that grows
    # with the text)
    body_at = [0 if c == 0 else int(ends[c - 1]) - 2 * c for c in cuts]
    del ends
    n_sentences = len(first.lengths)
    if n_chunks > 1:  # the sentences' lengths wait on disk too, read a chunk's at a time
        with _create(folder / "lengths") as fh:
            _write(fh, first.lengths)
        first = dataclasses.replace(first, lengths=first.lengths[:0])
    counting = Steps(progress, "counting n-grams", n_chunks * order)
    codec = KeyCodec(order, v)
    unigrams = np.zeros(v, dtype=np.int64)
    runs: list[list[Run]] = [[] for _ in range(order - 1)]
    whole: list[OrderCounts] | None = None
    # Chunk after chunk, memory kept by the allocator fragments and the peak creeps up
    # (measured on 60 million words of the bench text, 7 chunks: 2.0 to 2.3 GB); given
    # back after each array, it stays at the first chunk's (1.7 to 1.8 GB), for counting
    # 12 to 20 % slower. One chunk keeps the faster allocator.
    with freed_memory_returned() if n_chunks > 1 else contextlib.nullcontext():
        for j in range(n_chunks):
            a, b = cuts[j], cuts[j + 1]
            ids = np.fromfile(first.ids, dtype=np.int32, count=body_at[j + 1] - body_at[j],
                              offset=body_at[j] * 4)
            lengths = first.lengths[a:b] if n_chunks == 1 else np.fromfile(
                folder / "lengths", dtype=np.int64, count=b - a, offset=a * 8)
            stream = stream_from_lengths(table[ids], lengths)
            del lengths
            del ids
            floor = window_floor(stream, closed_vocab)
            tables = count_ngrams(stream.tokens, floor, order, v, progress=counting)
            del stream, floor
            if n_chunks == 1:
                whole = tables
                break
            unigrams += tables[0].count
            for k, keys in enumerate(codec.keys_of(tables)[1:], start=2):
                runs[k - 2].append(write_run(folder, f"run{j:05d}.{k}", keys,
                                             tables[k - 1].count))
            del tables
            give_back_freed_memory()  # the heap's free pages, before the next chunk
    counting.finish()
    first.ids.unlink()  # counted: the disk is freed
    (folder / "lengths").unlink(missing_ok=True)
    return Chunked(vocab, codec, unigrams, runs, whole, n_sentences, first.tokens, oov,
                   0 if n_chunks == 1 else n_chunks)


def merge_all(codec: KeyCodec, unigrams: I64, runs: list[list[Run]], memory: int,
              progress: Report | None) -> list[OrderCounts]:
    """Merge each order's runs (index 0: order 2) into the count tables."""
    merging = Steps(progress, "merging sorted runs", len(runs))
    keys: list[Keys] = []
    counts: list[I64] = []
    for order_runs in runs:
        spill = order_runs[0].keys.with_name(f"merged.{len(keys) + 2}") if order_runs else None
        k_keys, k_counts = merge_runs(order_runs, merge_block(memory, len(order_runs)), spill)
        for run in order_runs:  # free the disk as soon as an order is merged
            run.keys.unlink()
            run.counts.unlink()
        keys.append(k_keys)
        counts.append(k_counts)
        merging()
    return codec.tables_of(unigrams, keys, counts)
