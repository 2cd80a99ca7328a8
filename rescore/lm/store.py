"""The native model file: one self-checking binary container, no pickle.

Layout: an 8-byte magic, the format version (uint32), reserved (uint32), the header length
(uint64), a JSON header (metadata and a directory of arrays: name, dtype, shape, offset),
zero padding, the raw little-endian arrays each aligned to 64 bytes, then the sha256 of
every byte before it (the model's identity for provenance), an 8-byte integrity check of
everything before it, and an 8-byte end mark. Format 2 stores, per order from 2, the key
held in each hash slot (``held{k}``), which format 1 left to be derived on every load, and
checks integrity with XXH3-64 (about seven times as fast to verify here as format 1's
CRC-32, which with four zero bytes filled the same 8 bytes); both formats are read. Loading
memory-maps the file (read-only), verifies length, marks, version and CRC over the mapped
bytes, then views the arrays in place: every table is a
zero-copy numpy view of the mapping, so processes that load the same file share its pages
through the operating system's page cache instead of each holding a private copy.
An optional array ``sentence_hashes`` (the training text's fingerprint, see
:mod:`rescore.lm.fingerprint`; 8 bytes per distinct sentence) follows the tables when the
model has one; files without it load, with no fingerprint.
"""

from __future__ import annotations

import hashlib
import json
import mmap
import os
import struct
import zlib
from collections.abc import Iterator, Mapping
from pathlib import Path
from typing import Any

import numpy as np
import xxhash

from rescore.errors import ModelFileError
from rescore.lm.tables import BackoffTables
from rescore.lm.vocab import SPECIALS, Vocabulary
from rescore.outputs import atomic_output

MAGIC = b"RSCRLM\x00\n"
END = b"RSCREND\n"
FORMAT_VERSION = 2
READABLE_VERSIONS = (1, 2)
ALIGN = 64
_PREAMBLE = struct.Struct("<8sIIQ")
_TRAILER = 32 + 4 + 4 + 8
_DTYPES = {"<f8", "<u8", "<i4", "|u1"}


# optional arrays: absent from older files, and read back as None when absent
OPTIONAL_ARRAYS = ("sentence_hashes",)


def _arrays(tables: BackoffTables) -> list[tuple[str, np.ndarray[Any, Any]]]:
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
    return [(n, np.ascontiguousarray(a, dtype=a.dtype.newbyteorder("<"))) for n, a in out]


def _pad(n: int) -> int:
    return (-n) % ALIGN


def content_parts(tables: BackoffTables, metadata: dict[str, Any],
                  optional: Mapping[str, np.ndarray[Any, Any] | None] | None = None
                  ) -> Iterator[bytes | memoryview]:
    """The file's bytes before its digest, in order, without copying the arrays;
    ``optional`` holds the arrays of :data:`OPTIONAL_ARRAYS` to store (None: left out)."""
    arrays = _arrays(tables) + [
        (name, np.ascontiguousarray(arr, dtype=arr.dtype.newbyteorder("<")))
        for name, arr in sorted((optional or {}).items()) if arr is not None]
    directory = []
    offset = 0
    for name, arr in arrays:
        directory.append({"name": name, "dtype": arr.dtype.str, "shape": list(arr.shape),
                          "offset": offset})
        offset += arr.nbytes + _pad(arr.nbytes)
    header = json.dumps({"order": tables.order, "metadata": metadata, "arrays": directory},
                        sort_keys=True, separators=(",", ":"), allow_nan=False).encode("utf-8")
    preamble = _PREAMBLE.pack(MAGIC, FORMAT_VERSION, 0, len(header))
    yield preamble
    yield header
    yield b"\0" * _pad(len(preamble) + len(header))
    for _, arr in arrays:
        yield arr.reshape(-1).view(np.uint8).data
        yield b"\0" * _pad(arr.nbytes)


def save(tables: BackoffTables, metadata: dict[str, Any], path: str | Path,
         optional: Mapping[str, np.ndarray[Any, Any] | None] | None = None) -> str:
    """Write the model atomically; return its sha256."""
    digest = hashlib.sha256()
    check = xxhash.xxh3_64()
    with atomic_output(path, "wb") as fh:
        for part in content_parts(tables, metadata, optional):
            digest.update(part)
            check.update(part)
            fh.write(part)
        sha = digest.digest()
        check.update(sha)
        fh.write(sha + struct.pack("<Q", check.intdigest()) + END)
    return digest.hexdigest()


def _bad(path: str | Path, what: str) -> ModelFileError:
    return ModelFileError(f"not a valid rescore model file: {what}", path=str(path))


def map_file(path: str | Path) -> mmap.mmap:
    """The whole file mapped read-only (shared with every other mapping of it)."""
    try:
        with open(path, "rb") as fh:
            if os.fstat(fh.fileno()).st_size < _PREAMBLE.size + _TRAILER:
                raise _bad(path, "unknown file type (no rescore model mark)")
            # the mapping keeps its own reference to the file; closing fh does not unmap it
            return mmap.mmap(fh.fileno(), 0, access=mmap.ACCESS_READ)
    except FileNotFoundError:
        raise ModelFileError("file not found", path=str(path)) from None
    except IsADirectoryError:
        raise ModelFileError("is a folder, expected a model file", path=str(path)) from None
    except PermissionError:
        raise ModelFileError("permission denied", path=str(path)) from None
    except (OSError, ValueError) as exc:
        raise ModelFileError(f"cannot map the file ({exc})", path=str(path)) from None


def load(path: str | Path) -> tuple[BackoffTables, dict[str, Any], str]:
    """Map, verify and view a native model file: tables, metadata and sha256.

    The arrays of the returned tables are read-only views of the mapping (nothing is
    copied or unpickled); the mapping lives as long as any of them does.
    """
    tables, metadata, sha, _ = load_with_optional(path)
    return tables, metadata, sha


def load_with_optional(path: str | Path) -> tuple[BackoffTables, dict[str, Any], str,
                                                  dict[str, np.ndarray[Any, Any] | None]]:
    """:func:`load`, and the optional arrays by name (None where the file has none)."""
    data = map_file(path)
    if len(data) < _PREAMBLE.size + _TRAILER or data[:8] != MAGIC:
        raise _bad(path, "unknown file type (no rescore model mark)")
    _, version, _, header_len = _PREAMBLE.unpack_from(data)
    if version not in READABLE_VERSIONS:
        raise _bad(path, f"format version {version}, this program reads "
                         f"{' and '.join(map(str, READABLE_VERSIONS))}")
    if data[-8:] != END:
        raise _bad(path, "truncated (no end mark)")
    view = memoryview(data)
    body = view[:-_TRAILER]
    if not _intact(version, data, view[:-16]):
        raise _bad(path, "checksum mismatch (the file is damaged or was altered)")
    sha = data[-_TRAILER:-16].hex()
    try:
        header = json.loads(bytes(body[_PREAMBLE.size:_PREAMBLE.size + header_len]))
        start = _PREAMBLE.size + header_len
        start += _pad(start)
        arrays: dict[str, np.ndarray[Any, Any]] = {}
        for entry in header["arrays"]:
            dtype = np.dtype(entry["dtype"])
            if dtype.str not in _DTYPES:
                raise ValueError(f"array dtype {dtype.str}")
            count = int(np.prod(entry["shape"], dtype=np.int64))
            arrays[entry["name"]] = np.frombuffer(
                data, dtype=dtype, count=count, offset=start + int(entry["offset"])
            ).reshape(entry["shape"])
            if start + int(entry["offset"]) + arrays[entry["name"]].nbytes > len(body):
                raise ValueError(f"array {entry['name']} runs past the data")
        tables = _tables(int(header["order"]), arrays)
        optional = {name: arrays.get(name) for name in OPTIONAL_ARRAYS}
        hashes = optional["sentence_hashes"]
        if hashes is not None and (hashes.dtype.str != "<u8" or hashes.ndim != 1):
            raise ValueError("sentence_hashes")
        metadata = header["metadata"]
        if not isinstance(metadata, dict):
            raise ValueError("metadata is not an object")
    except (ValueError, KeyError, TypeError, IndexError) as exc:
        raise _bad(path, f"inconsistent contents ({exc})") from None
    return tables, metadata, sha, optional


def _intact(version: int, data: mmap.mmap, checked: memoryview) -> bool:
    """The integrity check of the trailer's 8 bytes before the end mark."""
    if version == 1:  # CRC-32 and four zero bytes
        (crc,) = struct.unpack_from("<I", data, len(data) - 16)
        return zlib.crc32(checked) == crc and data[-12:-8] == b"\0" * 4
    (check,) = struct.unpack_from("<Q", data, len(data) - 16)
    return bool(xxhash.xxh3_64_intdigest(checked) == check)


def _tables(order: int, arrays: dict[str, np.ndarray[Any, Any]]) -> BackoffTables:
    words = bytes(arrays["vocab"]).decode("utf-8").split("\n")
    if tuple(words[:3]) != SPECIALS or len(set(words)) != len(words):
        raise ValueError("vocabulary")
    vocab = Vocabulary.from_words(words[3:])
    logp = [arrays[f"logp{k}"] for k in range(1, order + 1)]
    bow = [arrays[f"bow{k}"] for k in range(1, order)]
    empty_u = np.zeros(0, np.uint64)
    empty_i = np.zeros(0, np.int32)
    keys = [empty_u] + [arrays[f"keys{k}"] for k in range(2, order + 1)]
    slots = [empty_i] + [arrays[f"slots{k}"] for k in range(2, order + 1)]
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
