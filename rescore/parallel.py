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
import logging
import os
import shutil
import tempfile
from collections.abc import Callable, Iterator, Sequence
from concurrent.futures import Future, ProcessPoolExecutor
from dataclasses import dataclass
from pathlib import Path
from typing import IO, Any

import numpy as np

from rescore.cluster import dask_client
from rescore.errors import InputError
from rescore.ioutil import (
    TMP_PREFIX,
    atomic_outputs,
    is_gzip_file,
    iter_text_lines,
    line_shards,
    open_binary,
)
from rescore.nbest import (
    IdLedger,
    ReadLimits,
    RecordParser,
    ScoreConvention,
    id_digest,
    read_refs,
)
from rescore.scoring import Weights

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


@dataclass(frozen=True)
class ShardResult:
    """What the main process needs of a shard: per record its line number, id digest and
    whether it had a reference (17 bytes a record, however long the ids), and a count."""

    lines: np.ndarray
    digests: np.ndarray
    has_reference: np.ndarray
    changed: int


_MODEL_CACHE: dict[tuple[tuple[str, str], ...], dict[str, Any]] = {}
_REFS_CACHE: dict[str, dict[str, str]] = {}


def _models(specs: tuple[tuple[str, str], ...]) -> dict[str, Any]:
    if not specs:
        return {}
    if specs not in _MODEL_CACHE:
        from rescore.lm import load_model

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
    from rescore.pipeline import batches, rescore_batch, write_scored

    parser = RecordParser(task.display_path, task.convention, _refs(task.refs_path),
                          task.require_references, task.limits)
    lms = _models(task.models)
    lines, digests, has_ref = array.array("q"), array.array("q"), bytearray()
    changed = 0

    def records() -> Iterator[tuple[int, Any]]:
        for number, line in iter_text_lines(task.path, task.limits.max_line_bytes,
                                            start=task.start, end=task.end,
                                            first_line=task.first_line):
            if number == task.skip_line or not line.strip():
                continue
            try:
                utt = parser.parse(number, line)
            except InputError as exc:
                exc.path = task.display_path
                raise
            lines.append(number)
            digests.append(id_digest(utt["id"]))
            has_ref.append("reference" in utt)
            yield number, utt

    # shard outputs live in the run's scratch folder, which the main process removes on any
    # failure; only the joined output is written atomically (and synced to disk)
    with contextlib.ExitStack() as stack:
        fh = stack.enter_context(open(task.out, "w", encoding="utf-8", newline="\n"))
        tsv: IO[str] | None = None
        if task.tsv is not None:
            tsv = stack.enter_context(open(task.tsv, "w", encoding="utf-8", newline="\n"))
        for batch in batches(records(), task.batch_size):
            scored = rescore_batch(batch, path=task.display_path, lms=lms,
                                   features=task.features, weights=task.weights)
            changed += write_scored(scored, fh, tsv, path=task.display_path,
                                    lines=[line for line, _ in batch])
    return ShardResult(np.frombuffer(lines, dtype=np.int64).copy(),
                       np.frombuffer(digests, dtype=np.int64).copy(),
                       np.frombuffer(has_ref, dtype=np.bool_).copy(), changed)


class _Runner:
    """A pool of worker processes or a Dask client, behind one `map` in input order."""

    def __init__(self, workers: int, cluster: str | None) -> None:
        self._stack = contextlib.ExitStack()
        self._client: Any = None
        self._pool: ProcessPoolExecutor | None = None
        if cluster is not None:
            self._client = self._stack.enter_context(dask_client(cluster, workers))
        else:
            self._pool = self._stack.enter_context(ProcessPoolExecutor(max_workers=workers))

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
        try:
            for f in submitted:
                yield f.result()
        finally:
            for f in submitted:
                f.cancel()

    def close(self) -> None:
        self._stack.close()


def apply_sharded(
    path: Path, out: Path, *, models: Sequence[tuple[str, str]], weights: Weights,
    features: Sequence[str], text_path: Path | None, refs_path: Path | None,
    convention: ScoreConvention, header_line: int, limits: ReadLimits, batch_size: int,
    workers: int, cluster: str | None, require_references: bool = False,
    progress: Callable[[int], None] | None = None, shard_bytes: int | None = None,
) -> tuple[int, int, int]:
    """Rescore ``path`` into ``out`` with shards; returns (utterances, changed 1-best,
    shards). The input is cut into at most ``4 * workers`` shards of at least
    ``shard_bytes`` each (default :data:`MIN_SHARD_BYTES`)."""
    folder = out.parent if str(out.parent) else Path(".")
    scratch = Path(tempfile.mkdtemp(prefix=f"{TMP_PREFIX}{out.name}.{os.getpid()}.shards.",
                                    dir=folder))
    runner: _Runner | None = None
    try:
        source = path
        if is_gzip_file(path):
            # gzip cannot be split by byte range: inflate once into the scratch folder
            source = scratch / "input.jsonl"
            with open_binary(path) as src, open(source, "wb") as dst:
                shutil.copyfileobj(src, dst, 1 << 20)
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
        ) for i, (a, b, first) in enumerate(shards)]
        log.info("%d shards of %s for %s", len(tasks), source,
                 f"cluster {cluster}" if cluster else f"{workers} worker processes")
        refs = None if refs_path is None else read_refs(refs_path)
        ledger = IdLedger(str(path), refs)
        runner = _Runner(workers, cluster)
        total = changed = 0
        from rescore.pipeline import check_accounting  # pipeline imports this module

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
                changed += result.changed
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
        return total, changed, len(tasks)
    finally:
        if runner is not None:
            runner.close()
        shutil.rmtree(scratch, ignore_errors=True)


def _append(part: Path, dst: IO[bytes]) -> int:
    """Copy ``part`` to the end of ``dst`` and delete it; returns the lines copied."""
    lines = 0
    with open(part, "rb") as src:
        for block in iter(lambda: src.read(1 << 20), b""):
            lines += block.count(b"\n")
            dst.write(block)
    part.unlink()
    return lines
