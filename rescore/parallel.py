"""Rescoring in parallel: byte-range shards of the input, processed by worker processes on
this machine (``--workers N``) or by a Dask cluster (``--cluster ADDRESS|local``).

Each task reads its own shard of the input file, loads the models from their files (once
per worker process; the native format is memory-mapped, so workers share its pages, and
no model is ever pickled), writes its own output shard, and returns per record its line
number, id digest and whether it had a reference. The main process checks the whole-file
rules (unique ids, references on all or none, the refs file covered) and appends the
shards in input order to the output as they complete, atomically. The output is
byte-identical to a single-process run.
"""

from __future__ import annotations

import array
import contextlib
import ctypes
import logging
import os
import signal
import sys
import threading
import time
from collections.abc import Callable, Iterator, Sequence
from concurrent.futures import Future, ProcessPoolExecutor
from dataclasses import dataclass
from pathlib import Path
from typing import IO, Any

import numpy as np

from rescore.batch import WriteCounts, batches, check_accounting, rescore_batch, write_scored
from rescore.cluster import dask_client
from rescore.compression import is_gzip_file
from rescore.counting import PLAIN, Counting
from rescore.errors import InputError
from rescore.leftovers import scratch_folder
from rescore.listcheck import ListStats
from rescore.lm import load_model
from rescore.nbest import (
    IdLedger,
    ReadLimits,
    RecordParser,
    ScoreConvention,
    id_digest,
    iter_records,
    read_refs,
)
from rescore.outputs import atomic_outputs, disk_full_error, is_disk_full
from rescore.readers import inflate
from rescore.shards import line_shards
from rescore.weights import Weights

log = logging.getLogger(__name__)

MIN_SHARD_BYTES = 1 << 20  # smaller shards cost more in start-up and joining than they save


@dataclass(frozen=True)
class ShardTask:
    """Everything a worker needs, as plain picklable values (paths, not models)."""

    path: str
    start: int
    end: int
    first_line: int
    skip_line: int
    out: str
    tsv: str | None
    convention: ScoreConvention
    limits: ReadLimits
    refs_path: str | None
    require_references: bool
    models: tuple[tuple[str, str], ...]
    weights: Weights
    features: tuple[str, ...]
    batch_size: int
    display_path: str
    target: str = ""  # the output the shard is for, named when its disk fills
    counting: Counting = PLAIN  # the unit of the LMs' tokens and the words column


@dataclass(frozen=True)
class ShardResult:
    """What the main process needs of a shard: per record its line number, id digest and
    whether it had a reference (17 bytes a record, however long the ids), and a count."""

    lines: np.ndarray
    digests: np.ndarray
    has_reference: np.ndarray
    counts: WriteCounts
    lists: ListStats


_MODEL_CACHE: dict[tuple[tuple[str, str], ...], dict[str, Any]] = {}
_REFS_CACHE: dict[str, dict[str, str]] = {}


def _models(specs: tuple[tuple[str, str], ...]) -> dict[str, Any]:
    if not specs:
        return {}
    if specs not in _MODEL_CACHE:
        _MODEL_CACHE[specs] = {name: load_model(path) for name, path in specs}
    return _MODEL_CACHE[specs]


def _refs(path: str | None) -> dict[str, str] | None:
    if path is None:
        return None
    if path not in _REFS_CACHE:
        _REFS_CACHE[path] = read_refs(path)
    return _REFS_CACHE[path]


def run_shard(task: ShardTask) -> ShardResult:
    """Rescore one shard into its own output file (runs inside a worker)."""
    parser = RecordParser(task.display_path, task.convention, _refs(task.refs_path),
                          task.require_references, task.limits)
    lms = _models(task.models)
    for (_, model_path), model in zip(task.models, lms.values(), strict=True):
        task.counting.check_model(model, path=model_path)
    lines, digests, has_ref = array.array("q"), array.array("q"), bytearray()
    counts = WriteCounts()
    stats = ListStats()

    def records() -> Iterator[tuple[int, Any]]:
        try:
            for number, utt in iter_records(task.path, parser, skip_line=task.skip_line,
                                            start=task.start, end=task.end,
                                            first_line=task.first_line):
                lines.append(number)
                digests.append(id_digest(utt["id"]))
                has_ref.append("reference" in utt)
                yield number, utt
        except InputError as exc:  # the file as the user named it, not a gzip's unpacked copy
            exc.path = task.display_path
            raise

    # shard outputs live in the run's scratch folder, which the main process removes on any
    # failure; only the joined output is written atomically (and synced to disk)
    try:
        with contextlib.ExitStack() as stack:
            fh = stack.enter_context(open(task.out, "w", encoding="utf-8", newline="\n"))
            tsv: IO[str] | None = None
            if task.tsv is not None:
                tsv = stack.enter_context(open(task.tsv, "w", encoding="utf-8", newline="\n"))
            for batch in batches(records(), task.batch_size):
                scored, batch_stats = rescore_batch(batch, path=task.display_path, lms=lms,
                                                    features=task.features,
                                                    weights=task.weights,
                                                    counting=task.counting)
                stats += batch_stats
                counts += write_scored(scored, fh, tsv, path=task.display_path,
                                       lines=[line for line, _ in batch])
    except OSError as exc:  # closing the files flushes them: it may fail the same way
        if not is_disk_full(exc):
            raise
        # the bytes the run holds beside the output: every shard so far, and the input
        # inflated from gzip
        raise disk_full_error(exc, task.target or task.out, _bytes_in(Path(task.out).parent)) \
            from None
    return ShardResult(np.frombuffer(lines, dtype=np.int64).copy(),
                       np.frombuffer(digests, dtype=np.int64).copy(),
                       np.frombuffer(has_ref, dtype=np.bool_).copy(), counts, stats)


PR_SET_PDEATHSIG = 1  # <linux/prctl.h>
WATCH_SECONDS = 1.0


def _die_with_parent(parent: int) -> None:
    """Worker initializer: end this worker when the main process ends, however it ends.

    A main process killed with SIGKILL runs no clean-up, and the pool's workers would go on
    (they block on a queue that nobody feeds; SIGTERM then reaches only the dead parent's
    pid). On Linux the kernel is asked to send SIGKILL to the worker when its parent dies
    (``prctl(PR_SET_PDEATHSIG)``): immediate, and it costs nothing while the parent lives.
    The signal follows the parent *thread* that forked the worker; the pool forks its
    workers from the thread that submits, the main thread here, which lives as long as the
    process. Elsewhere, or if prctl fails, a daemon thread checks the parent pid every
    second and exits the worker when it changes. Both check once after arming, for a parent
    that died before.

    A forked worker also inherits the command line's signal handlers: the SIGTERM handler
    would raise inside the worker when the main process ends the pool after an error, and
    print a worker traceback beside the one-line error. The worker takes the default
    SIGTERM (end quietly) and ignores SIGINT (Ctrl-C reaches the whole process group; the
    main process stops the pool itself).
    """
    signal.signal(signal.SIGTERM, signal.SIG_DFL)
    signal.signal(signal.SIGINT, signal.SIG_IGN)
    armed = False
    if sys.platform.startswith("linux"):
        with contextlib.suppress(OSError, AttributeError):
            libc = ctypes.CDLL(None, use_errno=True)
            armed = libc.prctl(PR_SET_PDEATHSIG, signal.SIGKILL, 0, 0, 0) == 0
    if os.getppid() != parent:
        os._exit(1)
    if not armed:
        threading.Thread(target=_watch_parent, args=(parent,), daemon=True,
                         name="rescore-parent-watch").start()


def _watch_parent(parent: int) -> None:
    while os.getppid() == parent:
        time.sleep(WATCH_SECONDS)
    os._exit(1)


def _bytes_in(folder: Path) -> int:
    total = 0
    for part in folder.iterdir():
        with contextlib.suppress(OSError):  # the main process deletes shards once joined
            total += part.stat().st_size
    return total


class _Runner:
    """A pool of worker processes or a Dask client, behind one `map` in input order."""

    def __init__(self, workers: int, cluster: str | None) -> None:
        self._stack = contextlib.ExitStack()
        self._client: Any = None
        self._pool: ProcessPoolExecutor | None = None
        if cluster is not None:
            self._client = self._stack.enter_context(dask_client(cluster, workers))
        else:
            self._pool = self._stack.enter_context(ProcessPoolExecutor(
                max_workers=workers, initializer=_die_with_parent, initargs=(os.getpid(),)))

    def map(self, fn: Callable[[ShardTask], ShardResult], tasks: Sequence[ShardTask]
            ) -> Iterator[ShardResult]:
        if self._client is not None:
            futures = self._client.map(fn, tasks, pure=False)
            try:
                for future in futures:
                    yield future.result()
            finally:
                self._client.cancel(futures)
            return
        assert self._pool is not None
        submitted: list[Future[ShardResult]] = [self._pool.submit(fn, t) for t in tasks]
        # no Future.cancel() from this thread when a shard fails: abort() has the pool's own
        # thread cancel what is pending. On Python 3.11, a future cancelled here and then
        # marked broken by that thread (the workers are terminated) raises InvalidStateError
        # inside it, which printed a stray line after the one-line error.
        for f in submitted:
            yield f.result()

    def close(self) -> None:
        self._stack.close()

    def abort(self) -> None:
        """Stop at once (an error, Ctrl-C, SIGTERM): pending shards are cancelled and the
        worker processes terminated, rather than waiting for the shards they are running."""
        if self._pool is not None:
            processes = list(getattr(self._pool, "_processes", {}).values())
            manager = getattr(self._pool, "_executor_manager_thread", None)
            self._pool.shutdown(wait=False, cancel_futures=True)
            for process in processes:
                with contextlib.suppress(Exception):
                    process.terminate()
            for process in processes:
                with contextlib.suppress(Exception):
                    process.join(timeout=5)
            if isinstance(manager, threading.Thread):
                # the pool's thread settles the futures before the error is printed
                manager.join(timeout=5)
        self.close()


def apply_sharded(
    path: Path, out: Path, *, models: Sequence[tuple[str, str]], weights: Weights,
    features: Sequence[str], text_path: Path | None, refs_path: Path | None,
    convention: ScoreConvention, header_line: int, limits: ReadLimits, batch_size: int,
    workers: int, cluster: str | None, require_references: bool = False,
    progress: Callable[[int], None] | None = None, shard_bytes: int | None = None,
    counting: Counting = PLAIN,
) -> tuple[int, WriteCounts, ListStats, int]:
    """Rescore ``path`` into ``out`` with shards; returns (utterances, what was written,
    the lists' score counts, shards). The input is cut into at most ``4 * workers``
    shards of at least ``shard_bytes`` each (default :data:`MIN_SHARD_BYTES`)."""
    with scratch_folder(out, "shards") as scratch:
        return _apply_in(scratch, path, out, models=models, weights=weights,
                         features=features, text_path=text_path, refs_path=refs_path,
                         convention=convention, header_line=header_line, limits=limits,
                         batch_size=batch_size, workers=workers, cluster=cluster,
                         require_references=require_references, progress=progress,
                         shard_bytes=shard_bytes, counting=counting)


def _apply_in(
    scratch: Path, path: Path, out: Path, *, models: Sequence[tuple[str, str]],
    weights: Weights, features: Sequence[str], text_path: Path | None,
    refs_path: Path | None, convention: ScoreConvention, header_line: int,
    limits: ReadLimits, batch_size: int, workers: int, cluster: str | None,
    require_references: bool, progress: Callable[[int], None] | None,
    shard_bytes: int | None, counting: Counting = PLAIN,
) -> tuple[int, WriteCounts, ListStats, int]:
    runner: _Runner | None = None
    try:
        source = path
        if is_gzip_file(path):
            # gzip cannot be split by byte range: inflate once into the scratch folder,
            # under the same caps and with the same errors as the one-process reader
            source = scratch / "input.jsonl"
            with open(source, "wb", buffering=0) as dst:  # unbuffered: nothing left to flush
                try:
                    inflate(path, dst, limits.max_line_bytes)
                except OSError as exc:
                    if not is_disk_full(exc):
                        raise
                    raise disk_full_error(exc, out, os.fstat(dst.fileno()).st_size) from None
        parts = max(1, workers) * 4
        shards = line_shards(source, parts,
                             MIN_SHARD_BYTES if shard_bytes is None else shard_bytes)
        tasks = [ShardTask(
            path=str(source), start=a, end=b, first_line=first, skip_line=header_line,
            out=str(scratch / f"{i:05d}.jsonl"),
            tsv=None if text_path is None else str(scratch / f"{i:05d}.tsv"),
            convention=convention, limits=limits,
            refs_path=None if refs_path is None else str(refs_path),
            require_references=require_references, models=tuple(models), weights=weights,
            features=tuple(features), batch_size=batch_size, display_path=str(path),
            target=str(out), counting=counting,
        ) for i, (a, b, first) in enumerate(shards)]
        log.info("%d shards of %s for %s", len(tasks), source,
                 f"cluster {cluster}" if cluster else f"{workers} worker processes")
        refs = None if refs_path is None else read_refs(refs_path)
        ledger = IdLedger(str(path), refs)
        runner = _Runner(workers, cluster)
        total = 0
        counts, stats = WriteCounts(), ListStats()

        targets = [out] if text_path is None else [out, text_path]
        with atomic_outputs(targets, "wb") as handles:
            # each shard is appended as soon as it and those before it are done, while the
            # workers go on with later shards, and then deleted; lines are counted as they
            # are copied, so the outputs appear only if every utterance read reached them
            joined_lines = [0] * len(handles)
            results = zip(tasks, runner.map(run_shard, tasks), strict=True)
            for number, (task, result) in enumerate(results, 1):
                ledger.admit_many(result.lines, result.digests, result.has_reference)
                total += len(result.lines)
                counts += result.counts
                stats += result.lists
                joined_lines[0] += _append(Path(task.out), handles[0])
                if text_path is not None and task.tsv is not None:
                    joined_lines[1] += _append(Path(task.tsv), handles[1])
                log.info("shard %d of %d joined (%d utterances so far)", number, len(tasks),
                         total)
                if progress is not None:
                    progress(len(result.lines))
            ledger.finish()
            if ledger.count == 0:
                raise InputError("no utterances in the file", path=path)
            for target, lines in zip(targets, joined_lines, strict=True):
                check_accounting(path, ledger.count, lines,
                                 f"lines in the joined {target}, so no output was kept")
    except BaseException:
        if runner is not None:
            runner.abort()
            runner = None
        raise
    else:
        return total, counts, stats, len(tasks)
    finally:
        if runner is not None:
            runner.close()


def _append(part: Path, dst: IO[bytes]) -> int:
    """Copy ``part`` to the end of ``dst`` and delete it; returns the lines copied."""
    lines = 0
    with open(part, "rb") as src:
        for block in iter(lambda: src.read(1 << 20), b""):
            lines += block.count(b"\n")
            dst.write(block)
    part.unlink()
    return lines
