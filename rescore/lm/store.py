"""The native model file: one self-checking binary container, no pickle.

Layout: an 8-byte magic, the format version (uint32), reserved (uint32), the header length
(uint64), a JSON header (metadata and a directory of arrays: name, dtype, shape, offset),
zero padding, the raw little-endian arrays each aligned to 64 bytes, then the sha256 of
every byte before it (the model's identity for provenance), an XXH3-64 integrity check of
everything before it, and an 8-byte end mark. Loading memory-maps the file (read-only),
verifies length, marks, version and check over the mapped bytes, validates the directory
against the file and against itself, then views the arrays in place: every table is a
zero-copy numpy view of the mapping, so processes that load the same file share its pages
through the operating system's page cache instead of each holding a private copy.

Format 3 (written now) is compact. Per order ``k >= 2`` it stores the n-grams in the order
of a :class:`~rescore.lm.hashindex.BucketIndex` of their keys: ``start{k}`` (uint32, one
per bucket, 2 to 4 keys per bucket: 1 to 2 bytes per n-gram) and ``rest{k}`` (the low bits
of each key's invertible hash, uint32: 4 bytes), then the float64 log-probabilities
``logp{k}`` (8 bytes) and, below the top order, back-off weights ``bow{k}`` (8 bytes).
Unigrams are dense over the vocabulary (``logp1``, ``bow1``) and the vocabulary is its
words joined by newlines. So an n-gram of order 2 or more costs 13 to 22 bytes, and a
model's average is about 8 + 8 x (share of n-grams below the top order) + 5.5: near 18
bytes for a 4-gram whose top order holds 40 % of its n-grams (format 2: 42). Nothing is
derived on loading; the probabilities stay float64 so scores are exactly those of the
model that was saved. Extra named arrays (``extra.NAME``, for instance
``extra.sentence_hashes``) travel beside the model. Formats 1 and 2 (sorted keys, hash
slots, and in format 2 the key held in each slot) are still read.
"""

from __future__ import annotations

import hashlib
import json
import mmap
import os
import struct
import zlib
from collections.abc import Iterator, Mapping
from dataclasses import dataclass
from pathlib import Path
from typing import Any

import numpy as np
import xxhash

from rescore.errors import ModelFileError, open_failure
from rescore.lm import pages
from rescore.lm.hashindex import BucketIndex
from rescore.lm.tables import BackoffTables, Coded
from rescore.lm.vocab import SPECIALS, Vocabulary
from rescore.outputs import atomic_output

MAGIC = b"RSCRLM\x00\n"
END = b"RSCREND\n"
FORMAT_VERSION = 3
READABLE_VERSIONS = (1, 2, 3)
ALIGN = 64
_PREAMBLE = struct.Struct("<8sIIQ")
_TRAILER = 32 + 4 + 4 + 8
_DTYPES = {"<f8", "<u8", "<i4", "<u4", "<u2", "|u1"}
EXTRA = "extra."  # the name prefix of the optional arrays stored beside the model
MAX_HEADER_BYTES = 64 << 20  # a header is metadata and a directory: kilobytes, not more
MAX_HEADER_DEPTH = 32  # the header nests a few levels; refuse deeper before parsing
MAX_ORDER = 6


@dataclass(frozen=True)
class Loaded:
    """A native model file's contents: the tables, metadata, sha256 and extra arrays."""

    tables: BackoffTables
    metadata: dict[str, Any]
    sha256: str
    extras: dict[str, np.ndarray[Any, Any]]
    version: int = FORMAT_VERSION
    size: int = 0  # bytes of the file


def _le(arr: np.ndarray[Any, Any]) -> np.ndarray[Any, Any]:
    return np.ascontiguousarray(arr, dtype=arr.dtype.newbyteorder("<"))


def _arrays(tables: BackoffTables, extras: Mapping[str, np.ndarray[Any, Any]] | None = None
            ) -> tuple[list[tuple[str, np.ndarray[Any, Any]]], list[dict[str, int]]]:
    """The arrays of format 3, in file order, and the index parameters of each order."""
    tables = tables.compact()
    assert tables.index is not None
    vocab = "\n".join(tables.vocab.words).encode("utf-8")
    out: list[tuple[str, np.ndarray[Any, Any]]] = [("vocab", np.frombuffer(vocab, np.uint8))]
    index: list[dict[str, int]] = []
    for k in range(1, tables.order + 1):
        if k > 1:
            idx = tables.index[k - 1]
            assert idx is not None
            out.append((f"start{k}", idx.starts))
            out.append((f"rest{k}", idx.rest))
            index.append({"order": k, "bits": idx.bits, "shift": idx.shift})
        out += _values(f"logp{k}", tables.logp[k - 1])
        if k < tables.order:
            out += _values(f"bow{k}", tables.bow[k - 1])
    for name in sorted(extras or {}):
        out.append((EXTRA + name, np.asarray((extras or {})[name]).reshape(-1)))
    return [(n, _le(a)) for n, a in out], index


def _values(name: str, values: Any) -> list[tuple[str, np.ndarray[Any, Any]]]:
    """A table's arrays: float64 values, or a quantized table's codes and code book."""
    if isinstance(values, Coded):
        return [(name, values.codes), (name.replace("logp", "logpbook").replace(
            "bow", "bowbook"), values.book)]
    return [(name, values)]


def _legacy_arrays(tables: BackoffTables) -> list[tuple[str, np.ndarray[Any, Any]]]:
    """The arrays of format 2 (format 1: the same less ``held{k}``), for tests of reading."""
    vocab = "\n".join(tables.vocab.words).encode("utf-8")
    out: list[tuple[str, np.ndarray[Any, Any]]] = [("vocab", np.frombuffer(vocab, np.uint8))]
    for k in range(1, tables.order + 1):
        out.append((f"logp{k}", tables.logp[k - 1]))
        if k < tables.order:
            out.append((f"bow{k}", tables.bow[k - 1]))
        if k > 1:
            out.append((f"keys{k}", tables.keys[k - 1]))
            out.append((f"slots{k}", tables.slots[k - 1]))
            out.append((f"held{k}", tables.held_keys(k)))
    return [(n, _le(a)) for n, a in out]


def _pad(n: int) -> int:
    return (-n) % ALIGN


class OnDisk:
    """A raw little-endian array in a file, copied into a model file a block at a time
    (never read whole)."""

    __slots__ = ("dtype", "path", "shape")

    def __init__(self, path: Path, dtype: np.dtype[Any], length: int) -> None:
        self.path, self.dtype, self.shape = path, dtype.newbyteorder("<"), (length,)

    @property
    def nbytes(self) -> int:
        return self.shape[0] * self.dtype.itemsize

    def blocks(self, size: int = 16 << 20) -> Iterator[bytes]:
        with open(self.path, "rb") as fh:
            left = self.nbytes
            while left:
                block = fh.read(min(size, left))
                if not block:
                    raise OSError(f"{self.path}: shorter than its {self.nbytes} bytes")
                left -= len(block)
                yield block


def _parts(arrays: list[tuple[str, Any]], header_fields: dict[str, Any],
           version: int) -> Iterator[bytes | memoryview]:
    directory = []
    offset = 0
    for name, arr in arrays:
        directory.append({"name": name, "dtype": arr.dtype.str, "shape": list(arr.shape),
                          "offset": offset})
        offset += arr.nbytes + _pad(arr.nbytes)
    header = json.dumps({**header_fields, "arrays": directory}, sort_keys=True,
                        separators=(",", ":"), allow_nan=False).encode("utf-8")
    preamble = _PREAMBLE.pack(MAGIC, version, 0, len(header))
    yield preamble
    yield header
    yield b"\0" * _pad(len(preamble) + len(header))
    for _, arr in arrays:
        if isinstance(arr, OnDisk):
            yield from arr.blocks()
        else:
            yield from pages.array_bytes(arr)
        yield b"\0" * _pad(arr.nbytes)


def content_parts(tables: BackoffTables, metadata: dict[str, Any],
                  extras: Mapping[str, np.ndarray[Any, Any]] | None = None
                  ) -> Iterator[bytes | memoryview]:
    """The file's bytes before its digest, in order, without copying the arrays."""
    arrays, index = _arrays(tables, extras)
    yield from _parts(arrays, {"order": tables.order, "metadata": metadata, "index": index},
                      FORMAT_VERSION)


def _write(parts: Iterator[bytes | memoryview], path: str | Path) -> str:
    digest = hashlib.sha256()
    check = xxhash.xxh3_64()
    with atomic_output(path, "wb") as fh:
        for part in parts:
            digest.update(part)
            check.update(part)
            fh.write(part)
        sha = digest.digest()
        check.update(sha)
        fh.write(sha + struct.pack("<Q", check.intdigest()) + END)
    return digest.hexdigest()


def save(tables: BackoffTables, metadata: dict[str, Any], path: str | Path,
         extras: Mapping[str, np.ndarray[Any, Any]] | None = None) -> str:
    """Write the model (format 3) atomically; return its sha256. ``extras`` are named
    arrays stored beside it (read back by :func:`load_file`)."""
    return _write(content_parts(tables, metadata, extras), path)


def save_arrays(arrays: list[tuple[str, Any]], index: list[dict[str, int]],
                metadata: dict[str, Any], path: str | Path) -> str:
    """Write a model (format 3) from its arrays in file order (each an array, or
    :class:`OnDisk`, little-endian) and each order's index parameters; return the sha256.
    The same bytes as :func:`save` of the tables those arrays describe."""
    order = len(index) + 1
    return _write(_parts(arrays, {"order": order, "metadata": metadata, "index": index},
                         FORMAT_VERSION), path)


def save_legacy(tables: BackoffTables, metadata: dict[str, Any], path: str | Path,
                version: int = 2) -> str:
    """Write format 2 as earlier releases did (format 1's trailer is left to tests)."""
    arrays = _legacy_arrays(tables)
    if version == 1:
        arrays = [(n, a) for n, a in arrays if not n.startswith("held")]
    return _write(_parts(arrays, {"order": tables.order, "metadata": metadata}, 2), path)


def bad_file(path: str | Path, what: str) -> ModelFileError:
    return ModelFileError(f"not a valid rescore model file: {what}", path=str(path))


def map_file(path: str | Path) -> mmap.mmap:
    """The whole file mapped read-only (shared with every other mapping of it)."""
    try:
        with open(path, "rb") as fh:
            if os.fstat(fh.fileno()).st_size < _PREAMBLE.size + _TRAILER:
                raise bad_file(path, "unknown file type (no rescore model mark)")
            # the mapping keeps its own reference to the file; closing fh does not unmap it
            return mmap.mmap(fh.fileno(), 0, access=mmap.ACCESS_READ)
    except (FileNotFoundError, IsADirectoryError, PermissionError) as exc:
        raise ModelFileError(open_failure(exc, "a model file"), path=str(path)) from None
    except (OSError, ValueError) as exc:
        raise ModelFileError(f"cannot map the file ({exc})", path=str(path)) from None


def load(path: str | Path, *, verify: bool = False) -> tuple[BackoffTables, dict[str, Any], str]:
    """Map, verify and view a native model file: tables, metadata and sha256.

    The arrays of the returned tables are read-only views of the mapping (nothing is
    copied or unpickled); the mapping lives as long as any of them does. ``verify`` adds
    the checks that read every value (see :func:`load_file`).
    """
    got = load_file(path, verify=verify)
    return got.tables, got.metadata, got.sha256


def _too_deep(header: bytes) -> bool:
    """Whether the JSON text nests deeper than MAX_HEADER_DEPTH (strings skipped)."""
    if header.count(b"[") + header.count(b"{") <= MAX_HEADER_DEPTH:
        return False
    depth = 0
    in_string = escaped = False
    for byte in header:
        if in_string:
            if escaped:
                escaped = False
            elif byte == 0x5C:
                escaped = True
            elif byte == 0x22:
                in_string = False
        elif byte == 0x22:
            in_string = True
        elif byte in (0x5B, 0x7B):
            depth += 1
            if depth > MAX_HEADER_DEPTH:
                return True
        elif byte in (0x5D, 0x7D):
            depth -= 1
    return False


def load_file(path: str | Path, *, verify: bool = False) -> Loaded:
    """Map, check and view a native model file, extra arrays included.

    Always checked (cheap): the marks, version, length and XXH3-64 check; the header's size
    and nesting before it is parsed; every array's name, dtype, shape, alignment, offset and
    length against the file and against the others; each order's sizes against the
    vocabulary, the order below and the metadata's counts. With ``verify`` also every value:
    probabilities are numbers <= 0 (``-inf`` is a zero probability), back-off weights
    finite, and the index's buckets and hashes in order (so keys are unique).
    """
    data = map_file(path)
    if len(data) < _PREAMBLE.size + _TRAILER or data[:8] != MAGIC:
        raise bad_file(path, "unknown file type (no rescore model mark)")
    _, version, _, header_len = _PREAMBLE.unpack_from(data)
    if version not in READABLE_VERSIONS:
        raise bad_file(path, f"format version {version}, this program reads "
                         f"{', '.join(map(str, READABLE_VERSIONS[:-1]))} and "
                         f"{READABLE_VERSIONS[-1]}")
    if data[-8:] != END:
        raise bad_file(path, "truncated (no end mark)")
    view = memoryview(data)
    body = view[:-_TRAILER]
    if not _intact(version, data, view[:-16]):
        raise bad_file(path, "checksum mismatch (the file is damaged or was altered)")
    sha = data[-_TRAILER:-16].hex()
    if header_len > min(MAX_HEADER_BYTES, len(body) - _PREAMBLE.size):
        raise bad_file(path, f"header of {header_len} bytes does not fit the file")
    raw = bytes(body[_PREAMBLE.size:_PREAMBLE.size + header_len])
    if _too_deep(raw):
        raise bad_file(path, f"header nested more than {MAX_HEADER_DEPTH} levels deep")
    try:
        header = json.loads(raw)
        if not isinstance(header, dict):
            raise ValueError("the header is not an object")
        start = _PREAMBLE.size + header_len
        start += _pad(start)
        arrays = _view_arrays(data, header.get("arrays"), start, len(body))
        order = header.get("order")
        if not isinstance(order, int) or isinstance(order, bool) or not 1 <= order <= MAX_ORDER:
            raise ValueError(f"order {order!r}")
        metadata = header.get("metadata")
        if not isinstance(metadata, dict):
            raise ValueError("metadata is not an object")
        extras = {n[len(EXTRA):]: a for n, a in arrays.items() if n.startswith(EXTRA)}
        if version == 3:
            tables = _compact_tables(order, arrays, header.get("index"), verify)
        else:
            tables = _tables(order, arrays)
            if verify:
                _check_values(tables)
        ngrams = metadata.get("ngrams")
        if ngrams is not None and ngrams != tables.n_ngrams():
            raise ValueError(f"metadata counts {ngrams!r}, the tables hold {tables.n_ngrams()}")
    except (ValueError, KeyError, TypeError, IndexError, OverflowError) as exc:
        raise bad_file(path, f"inconsistent contents ({exc})") from None
    except RecursionError:  # pragma: no cover - the depth is checked before parsing
        raise bad_file(path, "header nested too deeply") from None
    return Loaded(tables, metadata, sha, extras, int(version), len(data))


def _view_arrays(data: mmap.mmap, directory: Any, start: int, end: int
                 ) -> dict[str, np.ndarray[Any, Any]]:
    """Each directory entry viewed in place, after checking it against the file and the
    entries before it (in increasing offsets, aligned, not overlapping)."""
    if not isinstance(directory, list):
        raise ValueError("no array directory")
    arrays: dict[str, np.ndarray[Any, Any]] = {}
    at = 0
    for entry in directory:
        if not isinstance(entry, dict) or set(entry) != {"name", "dtype", "shape", "offset"}:
            raise ValueError("array directory entry")
        name, dtype_str, shape, offset = (entry["name"], entry["dtype"], entry["shape"],
                                          entry["offset"])
        if not isinstance(name, str) or name in arrays or len(name) > 200:
            raise ValueError(f"array name {name!r}")
        if dtype_str not in _DTYPES:
            raise ValueError(f"array {name} dtype {dtype_str!r}")
        if (not isinstance(shape, list) or len(shape) != 1
                or not all(isinstance(d, int) and not isinstance(d, bool) and d >= 0
                           for d in shape)):
            raise ValueError(f"array {name} shape {shape!r}")
        # the layout is canonical: each array starts at the first aligned offset after the
        # one before it, so an offset moved elsewhere (into another array) is refused
        if not isinstance(offset, int) or isinstance(offset, bool) or offset != at + _pad(at):
            raise ValueError(f"array {name} offset {offset!r}")
        dtype = np.dtype(dtype_str)
        nbytes = shape[0] * dtype.itemsize
        if start + offset + nbytes > end:
            raise ValueError(f"array {name} runs past the data")
        arrays[name] = np.frombuffer(data, dtype=dtype, count=shape[0], offset=start + offset)
        at = offset + nbytes
    return arrays


def _want(arrays: dict[str, np.ndarray[Any, Any]], name: str, dtypes: tuple[str, ...],
          length: int | None = None) -> np.ndarray[Any, Any]:
    arr = arrays.get(name)
    if arr is None:
        raise ValueError(f"array {name} missing")
    if arr.dtype.str not in dtypes:
        raise ValueError(f"array {name} dtype {arr.dtype.str}")
    if length is not None and len(arr) != length:
        raise ValueError(f"array {name} holds {len(arr)} values, expected {length}")
    return arr


def _vocabulary(arrays: dict[str, np.ndarray[Any, Any]]) -> Vocabulary:
    words = bytes(_want(arrays, "vocab", ("|u1",))).decode("utf-8").split("\n")
    if tuple(words[:3]) != SPECIALS or len(set(words)) != len(words):
        raise ValueError("vocabulary")
    return Vocabulary.from_words(words[3:])


def _compact_tables(order: int, arrays: dict[str, np.ndarray[Any, Any]], index_params: Any,
                    verify: bool) -> BackoffTables:
    vocab = _vocabulary(arrays)
    v = len(vocab)
    known = {"vocab"} | {f"logp{k}" for k in range(1, order + 1)} \
        | {f"bow{k}" for k in range(1, order)} \
        | {f"logpbook{k}" for k in range(2, order + 1)} | {f"bowbook{k}" for k in range(2, order)} \
        | {f"{a}{k}" for k in range(2, order + 1) for a in ("start", "rest")}
    stray = [n for n in arrays if n not in known and not n.startswith(EXTRA)]
    if stray:
        raise ValueError(f"unknown array {stray[0]!r}")
    if not isinstance(index_params, list) or len(index_params) != order - 1:
        raise ValueError("index parameters")
    logp = [_want(arrays, "logp1", ("<f8",), v)]
    bow = [_want(arrays, "bow1", ("<f8",), v)] if order > 1 else []
    index: list[BucketIndex | None] = [None]
    for k in range(2, order + 1):
        params = index_params[k - 2]
        if (not isinstance(params, dict) or set(params) != {"order", "bits", "shift"}
                or params["order"] != k
                or not all(isinstance(params[p], int) and not isinstance(params[p], bool)
                           for p in params)):
            raise ValueError(f"order {k} index parameters")
        bits, shift = params["bits"], params["shift"]
        rest = _want(arrays, f"rest{k}", ("<u4",) if shift <= 32 else ("<u8",))
        n = len(rest)
        if bits != BucketIndex.key_bits(len(logp[k - 2]) * v) or not 0 <= shift <= bits:
            raise ValueError(f"order {k} key width")
        if bits - shift > 40:
            raise ValueError(f"order {k} bucket count")
        starts = _want(arrays, f"start{k}", ("<u4", "<u8"), (1 << (bits - shift)) + 1)
        idx = BucketIndex(bits, shift, starts, rest)
        # the ends first (cheap); the order of every bucket start below with --verify
        if int(starts[0]) != 0 or int(starts[-1]) != n:
            raise ValueError(f"order {k} bucket starts")
        if n > 1 << 40:
            raise ValueError(f"order {k} count")
        logp.append(_table(arrays, f"logp{k}", n))
        if k < order:
            bow.append(_table(arrays, f"bow{k}", n))
        if verify:
            problem = idx.check()
            if problem is None and not idx.check_unique():
                problem = "hashes out of order (keys not unique)"
            if problem:
                raise ValueError(f"order {k} {problem}")
        index.append(idx)
    tables = BackoffTables(vocab, logp, bow, [], [], index)
    if verify:
        _check_values(tables)
    return tables


def _table(arrays: dict[str, np.ndarray[Any, Any]], name: str, n: int) -> Any:
    """A table of ``n`` float64 values, or (quantized) ``n`` codes and a full code book."""
    arr = _want(arrays, name, ("<f8", "|u1", "<u2"), n)
    if arr.dtype.str == "<f8":
        return arr
    book_name = name.replace("logp", "logpbook").replace("bow", "bowbook")
    book = _want(arrays, book_name, ("<f8",))
    if not 1 <= len(book) <= 1 << (8 * arr.dtype.itemsize):
        raise ValueError(f"array {book_name} holds {len(book)} values")
    return Coded(arr, book)  # a code past the book reads its last entry; --verify refuses it


def _check_values(tables: BackoffTables) -> None:
    """Probabilities are numbers <= 0 (``-inf``: zero), back-off weights finite."""
    def plain(values: Any) -> np.ndarray[Any, Any]:
        if isinstance(values, Coded):
            if len(values.codes) and int(values.codes.max()) >= len(values.book):
                raise ValueError("a code past its code book")
            return values.book
        return np.asarray(values)

    for k in range(1, tables.order + 1):
        p = plain(tables.logp[k - 1])
        if not bool(np.all(p <= 0)):  # NaN fails the comparison too
            raise ValueError(f"order {k} probabilities: NaN or above 1")
        if k < tables.order and not bool(np.all(np.isfinite(plain(tables.bow[k - 1])))):
            raise ValueError(f"order {k} back-off weights: not finite")


def _intact(version: int, data: mmap.mmap, checked: memoryview) -> bool:
    """The integrity check of the trailer's 8 bytes before the end mark."""
    if version == 1:  # CRC-32 and four zero bytes
        (crc,) = struct.unpack_from("<I", data, len(data) - 16)
        return zlib.crc32(checked) == crc and data[-12:-8] == b"\0" * 4
    (check,) = struct.unpack_from("<Q", data, len(data) - 16)
    digest = xxhash.xxh3_64()
    for piece in pages.read_through(data, 0, checked):
        digest.update(piece)
    return bool(digest.intdigest() == check)


def _tables(order: int, arrays: dict[str, np.ndarray[Any, Any]]) -> BackoffTables:
    """Formats 1 and 2: sorted keys and hash slots (format 2 also the held keys)."""
    vocab = _vocabulary(arrays)
    logp = [_want(arrays, f"logp{k}", ("<f8",)) for k in range(1, order + 1)]
    bow = [_want(arrays, f"bow{k}", ("<f8",)) for k in range(1, order)]
    empty_u = np.zeros(0, np.uint64)
    empty_i = np.zeros(0, np.int32)
    keys = [empty_u] + [_want(arrays, f"keys{k}", ("<u8",)) for k in range(2, order + 1)]
    slots = [empty_i] + [_want(arrays, f"slots{k}", ("<i4",)) for k in range(2, order + 1)]
    if len(logp[0]) != len(vocab):
        raise ValueError("unigram table size")
    for k in range(1, order + 1):
        n = len(logp[k - 1])
        if k < order and len(bow[k - 1]) != n:
            raise ValueError(f"order {k} back-off weights")
        if k > 1:
            if len(keys[k - 1]) != n or len(slots[k - 1]) & (len(slots[k - 1]) - 1):
                raise ValueError(f"order {k} keys or slots")
            s = slots[k - 1]
            if len(s) < n or (len(s) and (int(s.max()) >= n or int(s.min()) < -1)):
                raise ValueError(f"order {k} hash slots")
    tables = BackoffTables(vocab, logp, bow, keys, slots)
    tables.give_held_keys({k: arrays[f"held{k}"] for k in range(2, order + 1)
                           if f"held{k}" in arrays})
    return tables
