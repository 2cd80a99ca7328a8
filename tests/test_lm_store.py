"""The native model file: round trip, and every kind of damage refused."""

from __future__ import annotations

import hashlib
import re
import struct
import zipfile
import zlib
from pathlib import Path

import numpy as np
import pytest
import xxhash

from rescore.errors import ModelFileError
from rescore.lm import NGramModel, load_model, save_model

SENTS = [["pump", "two", "on"], ["pump", "three", "off"], ["vent", "bay", "three", "open"]]


@pytest.fixture
def saved(tmp_path: Path) -> tuple[NGramModel, Path]:
    model = NGramModel(3, "mkn").fit(SENTS)
    path = tmp_path / "greenhouse.lm"
    save_model(model, path)
    return model, path


def test_round_trip_gives_identical_scores(saved: tuple[NGramModel, Path]) -> None:
    model, path = saved
    loaded = load_model(path)
    probe = [*SENTS, ["pump", "bay", "unseen"]]
    # the arrays are stored as raw IEEE-754 little-endian bytes, so a lossless format gives
    # bit-identical scores (exact equality, no tolerance; derivation from the layout)
    np.testing.assert_array_equal(loaded.logprob(probe), model.logprob(probe))
    # the identity is the sha256 (FIPS 180-4, Python's hashlib) of every byte before the
    # 48-byte trailer (digest 32, XXH3-64 8, end mark 8), also recomputed in memory; the
    # XXH3-64 check (xxhash library) covers everything before it
    data = path.read_bytes()
    assert loaded.checksum == model.checksum == hashlib.sha256(data[:-48]).hexdigest()
    assert data[-48:-16] == bytes.fromhex(model.checksum)
    assert struct.unpack("<Q", data[-16:-8])[0] == xxhash.xxh3_64_intdigest(data[:-16])
    assert loaded.metadata["discounts"] == model.metadata["discounts"]
    assert loaded.order_ == 3 and loaded.vocab_.words == model.vocab_.words


def test_checksum_is_content_not_name(saved: tuple[NGramModel, Path], tmp_path: Path) -> None:
    # sha256 of the content: equal data gives equal digests, different data different ones
    # (collisions are not expected in practice, from memory); training is deterministic
    model, _ = saved
    again = NGramModel(3, "mkn").fit(SENTS)
    other = NGramModel(3, "wb").fit(SENTS)
    assert again.checksum == model.checksum != other.checksum


@pytest.mark.parametrize("where", [0.01, 0.3, 0.6, 0.99])
def test_flipped_byte_is_refused(saved: tuple[NGramModel, Path], where: float) -> None:
    # XOR 0x40 flips one bit; a 64-bit hash of the content misses a change with probability
    # about 2**-64 (from memory), and the magic, version and end mark are checked too
    _, path = saved
    data = bytearray(path.read_bytes())
    data[int(where * (len(data) - 1))] ^= 0x40
    path.write_bytes(bytes(data))
    with pytest.raises(ModelFileError, match="not a valid rescore model file"):
        load_model(path)


@pytest.mark.parametrize("keep", [0, 10, 100, -1])
def test_truncation_is_refused(saved: tuple[NGramModel, Path], keep: int) -> None:
    # a cut file loses its 8-byte end mark (or its magic), which the loader checks first
    _, path = saved
    data = path.read_bytes()
    path.write_bytes(data[:keep])
    with pytest.raises(ModelFileError):
        load_model(path)


def test_foreign_npz_is_refused(tmp_path: Path) -> None:
    # a numpy .npz is a zip archive (numpy's documented format), so it lacks our magic
    path = tmp_path / "other.npz"
    np.savez(path, logp1=np.zeros(3))
    assert zipfile.is_zipfile(path)
    with pytest.raises(ModelFileError, match="unknown file type"):
        load_model(path)


def test_missing_file_names_it(tmp_path: Path) -> None:
    # bad input: one line naming the file (the project's error rule)
    with pytest.raises(ModelFileError, match="file not found") as info:
        load_model(tmp_path / "nope.lm")
    assert "nope.lm" in str(info.value)


class _TouchOnLoad:
    """Unpickling this creates ``path``: a stand-in for code run by a hostile model file."""

    def __init__(self, path: Path) -> None:
        self.path = path

    def __reduce__(self) -> tuple[object, ...]:
        return (Path.touch, (self.path,))


def test_pickled_npz_is_refused_without_running_it(tmp_path: Path) -> None:
    # Reliability audit: the foreign-file test above holds only zeros. A .npz may hold a
    # pickled object array, and numpy runs its code when it is loaded with pickle allowed
    # (numpy.load documentation, allow_pickle). The model loader must never do that.
    marker = tmp_path / "code-ran"
    path = tmp_path / "hostile.npz"
    np.savez(path, logp1=np.array([_TouchOnLoad(marker)], dtype=object))
    with np.load(path, allow_pickle=True) as archive:  # the payload is live: this runs it
        archive["logp1"]
    assert marker.exists()
    marker.unlink()
    with pytest.raises(ModelFileError, match="unknown file type") as info:
        load_model(path)
    assert str(info.value).startswith(f"{path}: ") and "\n" not in str(info.value)
    assert not marker.exists()


def test_pickled_npz_through_the_command_line(tmp_path: Path) -> None:
    from tests.conftest import run

    marker = tmp_path / "code-ran"
    path = tmp_path / "hostile.npz"
    np.savez(path, logp1=np.array([_TouchOnLoad(marker)], dtype=object))
    text = tmp_path / "t.txt"
    text.write_text("pump two on\n")
    result = run(["lm", "perplexity", path, text])
    assert result.exit_code == 1
    assert result.stderr.startswith(f"error: {path}: not a valid rescore model file")
    assert result.stderr.count("\n") == 1 and "Traceback" not in result.stderr
    assert not marker.exists()


def _with_version(data: bytes, version: int) -> bytes:
    """The same file with another format version and its checksums made to match again.

    Layout from the rescore.lm.store docstring: magic (8 bytes), version (uint32 LE), ...;
    the trailer is sha256 of everything before it (32), the integrity check of everything
    before it (8: format 1 a CRC-32 and four zero bytes, format 2 an XXH3-64) and an 8-byte
    end mark.
    """
    import hashlib
    import struct

    body = bytearray(data[:-48])
    body[8:12] = struct.pack("<I", version)
    sha = hashlib.sha256(body).digest()
    if version == 1:
        check = struct.pack("<I", zlib.crc32(bytes(body) + sha)) + b"\0" * 4
    else:
        check = struct.pack("<Q", xxhash.xxh3_64_intdigest(bytes(body) + sha))
    return bytes(body) + sha + check + data[-8:]


def test_other_format_version_is_refused_clearly(saved: tuple[NGramModel, Path]) -> None:
    # Reliability audit: a newer (or older) file must be refused by its version, not read
    # as a wrong model; only the version differs here, the checksums are valid.
    _, path = saved
    original = path.read_bytes()
    assert _with_version(original, 3) == original  # the rebuild changes nothing else
    path.write_bytes(_with_version(original, 4))
    with pytest.raises(ModelFileError) as info:
        load_model(path)
    assert str(info.value) == (f"{path}: not a valid rescore model file: format version 4, "
                               "this program reads 1, 2 and 3")


def _mapping_of(arr: np.ndarray) -> object:
    """The object at the end of an array's ``base`` chain (through any memoryview)."""
    obj: object = arr
    while isinstance(obj, np.ndarray) and obj.base is not None:
        obj = obj.base
    return obj.obj if isinstance(obj, memoryview) else obj


def test_loaded_arrays_are_zero_copy_views_of_the_file_mapping(
        saved: tuple[NGramModel, Path]) -> None:
    # mmap(2): a MAP_SHARED read-only mapping is backed by the page cache, so processes
    # mapping the same file share its pages; the arrays must lie inside that mapping
    import mmap

    _, path = saved
    tables = load_model(path).tables_
    assert tables.index is not None
    arrays = [*tables.logp, *tables.bow, *(i.starts for i in tables.index[1:] if i),
              *(i.rest for i in tables.index[1:] if i)]
    mapping = _mapping_of(arrays[0])
    assert isinstance(mapping, mmap.mmap)
    whole = np.frombuffer(mapping, dtype=np.uint8)
    assert len(whole) == path.stat().st_size
    for arr in arrays:
        assert _mapping_of(arr) is mapping
        assert np.shares_memory(arr, whole)
        assert not arr.flags.writeable


def test_loading_maps_the_file_in_the_process(saved: tuple[NGramModel, Path]) -> None:
    # proc(5): /proc/self/maps lists every file mapped into the process
    maps = Path("/proc/self/maps")
    if not maps.exists():
        pytest.skip("no /proc on this system")
    _, path = saved
    model = load_model(path)
    assert str(path.resolve()) in maps.read_text()
    del model


def test_loading_never_unpickles(saved: tuple[NGramModel, Path],
                                 monkeypatch: pytest.MonkeyPatch) -> None:
    import pickle

    def refuse(*args: object, **kwargs: object) -> None:
        raise AssertionError("pickle used while loading a model")

    for name in ("load", "loads", "Unpickler"):
        monkeypatch.setattr(pickle, name, refuse)
    model, path = saved
    assert load_model(path).checksum == model.checksum


def test_formats_1_and_2_still_read_the_same(saved: tuple[NGramModel, Path],
                                             tmp_path: Path) -> None:
    # format 2 (sorted keys, hash slots and the key held in each slot) and format 1 (the
    # same less the held keys, a CRC-32 trailer) are still read, as those releases wrote
    # them: the same probabilities for every n-gram as the format 3 file
    from rescore.lm import store

    model, path = saved
    tables = model.tables_
    old1, old2 = tmp_path / "v1.lm", tmp_path / "v2.lm"
    store.save_legacy(tables, {"method": "mkn"}, old1, version=1)
    old1.write_bytes(_with_version(old1.read_bytes(), 1))  # format 1's trailer: CRC-32
    store.save_legacy(tables, {"method": "mkn"}, old2, version=2)
    assert old1.read_bytes()[8:12] == (1).to_bytes(4, "little")
    assert old2.read_bytes()[8:12] == (2).to_bytes(4, "little")
    v1, _, _ = store.load(old1)
    v2, _, _ = store.load(old2)
    v3, _, _ = store.load(path)
    assert not v1._held  # nothing given: derived on first use
    assert set(v2._held) == set(range(2, tables.order + 1))  # given by the file
    probe = np.array([[-1, 3, 4], [3, 4, 5], [0, 3, 1], [5, 5, 5]])
    for other in (v1, v2):
        assert np.array_equal(other.score_ngrams(probe), v3.score_ngrams(probe))
    for k in range(2, tables.order + 1):
        assert np.array_equal(v1.held_keys(k), v2.held_keys(k))
    # format 1's own check (CRC-32) still guards it
    damaged = bytearray(old1.read_bytes())
    damaged[len(damaged) // 2] ^= 0x40
    old1.write_bytes(bytes(damaged))
    with pytest.raises(ModelFileError, match="checksum mismatch"):
        store.load(old1)


def _resident_kib(path: Path) -> int:
    """Kibibytes of this process's memory held by its mappings of ``path`` (proc(5): the
    ``Rss:`` line under each mapping of /proc/self/smaps)."""
    total, inside = 0, False
    for line in Path("/proc/self/smaps").read_text().splitlines():
        if re.match(r"[0-9a-f]+-[0-9a-f]+ ", line):
            inside = line.endswith(str(path.resolve()))
        elif inside and line.startswith("Rss:"):
            total += int(line.split()[1])
    return total


def test_checking_and_copying_a_mapped_model_do_not_hold_its_pages(tmp_path: Path) -> None:
    # madvise(2): MADV_DONTNEED on a shared file mapping drops the pages from the process
    # (its Rss, proc(5)) while the page cache keeps them. Loading reads every byte for the
    # checksum and saving a loaded model reads every array; neither may keep them all.
    if not Path("/proc/self/smaps").exists():
        pytest.skip("no /proc/self/smaps on this system")
    from test_lm_external import _zipf_sentences

    path = tmp_path / "big.lm"
    save_model(NGramModel(3).fit(_zipf_sentences(300_000, 5_000, 3)), path)
    size_kib = path.stat().st_size >> 10
    assert size_kib > 4096  # a file of many pages (the kernel maps 64 KiB around a fault)
    model = load_model(path)
    assert _resident_kib(path) < size_kib / 4
    save_model(model, tmp_path / "copy.lm")
    assert _resident_kib(path) < size_kib / 4
    assert (tmp_path / "copy.lm").read_bytes() == path.read_bytes()
    # the arrays still read as before: the kernel maps the cached pages again
    assert load_model(tmp_path / "copy.lm").checksum == model.checksum
    assert np.array_equal(model.tables_.logp[0], load_model(path).tables_.logp[0])
