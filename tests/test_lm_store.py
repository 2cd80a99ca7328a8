"""The native model file: round trip, and every kind of damage refused."""

from __future__ import annotations

import zipfile
from pathlib import Path

import numpy as np
import pytest

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
    np.testing.assert_array_equal(loaded.logprob(probe), model.logprob(probe))
    assert loaded.checksum == model.checksum
    assert loaded.metadata["discounts"] == model.metadata["discounts"]
    assert loaded.order_ == 3 and loaded.vocab_.words == model.vocab_.words


def test_checksum_is_content_not_name(saved: tuple[NGramModel, Path], tmp_path: Path) -> None:
    model, _ = saved
    again = NGramModel(3, "mkn").fit(SENTS)
    other = NGramModel(3, "wb").fit(SENTS)
    assert again.checksum == model.checksum != other.checksum


@pytest.mark.parametrize("where", [0.01, 0.3, 0.6, 0.99])
def test_flipped_byte_is_refused(saved: tuple[NGramModel, Path], where: float) -> None:
    _, path = saved
    data = bytearray(path.read_bytes())
    data[int(where * (len(data) - 1))] ^= 0x40
    path.write_bytes(bytes(data))
    with pytest.raises(ModelFileError, match="not a valid rescore model file"):
        load_model(path)


@pytest.mark.parametrize("keep", [0, 10, 100, -1])
def test_truncation_is_refused(saved: tuple[NGramModel, Path], keep: int) -> None:
    _, path = saved
    data = path.read_bytes()
    path.write_bytes(data[:keep])
    with pytest.raises(ModelFileError):
        load_model(path)


def test_foreign_npz_is_refused(tmp_path: Path) -> None:
    path = tmp_path / "other.npz"
    np.savez(path, logp1=np.zeros(3))
    assert zipfile.is_zipfile(path)
    with pytest.raises(ModelFileError, match="unknown file type"):
        load_model(path)


def test_missing_file_names_it(tmp_path: Path) -> None:
    with pytest.raises(ModelFileError, match="file not found") as info:
        load_model(tmp_path / "nope.lm")
    assert "nope.lm" in str(info.value)


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
    arrays = [*tables.logp, *tables.bow, *tables.keys[1:], *tables.slots[1:]]
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
