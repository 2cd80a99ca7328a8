"""A build within a memory budget estimated with its orders on disk (rescore/lm/ondisk.py).

Two outside checks: the probabilities of the plain dict reference (tests/lm_reference.py,
each method's textbook formula written out), and the bytes of the in-memory build, whose
own probabilities the same reference checks (tests/test_lm_model.py)."""

from __future__ import annotations

from pathlib import Path
from typing import Any

import pytest
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st
from lm_reference import ReferenceModel, assert_matches_reference
from test_lm_external import SENTS, TINY, _zipf_sentences

from rescore.errors import InputError
from rescore.leftovers import TMP_PREFIX
from rescore.lm import METHODS, NGramModel, load_model, ondisk, rawfiles, save_model, store
from tests.conftest import full_disk_for

NORM_TOL = 1e-9  # our tolerance for reference matches (as tests/test_lm_model.py)

corpora = st.lists(
    st.lists(st.sampled_from("abcde"), min_size=0, max_size=7), min_size=1, max_size=8
)


def _bytes(model: NGramModel, folder: Path, name: str) -> bytes:
    save_model(model, folder / name)
    return (folder / name).read_bytes()


@pytest.mark.parametrize("method", list(METHODS))
@settings(max_examples=15, deadline=None, suppress_health_check=[
    HealthCheck.too_slow, HealthCheck.function_scoped_fixture])
@given(sents=corpora, order=st.integers(1, 5), closed=st.booleans())
def test_on_disk_matches_dict_reference_and_memory_build(
        tmp_path: Path, method: str, sents: list[list[str]], order: int, closed: bool) -> None:
    # the plain reference writes each formula out directly (tests/lm_reference.py)
    model = NGramModel(order, method, closed_vocab=closed).fit(sents, memory=TINY,
                                                               scratch=tmp_path)
    ref = ReferenceModel(sents, order, method, closed=closed)
    assert_matches_reference(model, ref, NORM_TOL)
    plain = NGramModel(order, method, closed_vocab=closed).fit(sents)
    assert _bytes(model, tmp_path, "disk.lm") == _bytes(plain, tmp_path, "plain.lm")
    assert [p.name for p in tmp_path.iterdir() if p.name.startswith(TMP_PREFIX)] == []


@pytest.mark.parametrize("method", list(METHODS))
def test_every_method_byte_identical_over_many_runs(tmp_path: Path, method: str) -> None:
    # the reference here is the in-memory build of the same text (checked against the dict
    # reference in tests/test_lm_model.py); TINY forces dozens of sorted runs
    plain = NGramModel(4, method).fit(SENTS)
    disk = NGramModel(4, method).fit(SENTS, memory=TINY, scratch=tmp_path)
    assert _bytes(disk, tmp_path, "disk.lm") == _bytes(plain, tmp_path, "plain.lm")
    assert disk.metadata_ == plain.metadata_
    assert disk.checksum == plain.checksum


@pytest.mark.parametrize("method", list(METHODS))
def test_orders_smoothed_a_few_ngrams_at_a_time_are_byte_identical(
        tmp_path: Path, method: str, monkeypatch: pytest.MonkeyPatch) -> None:
    # blocks of 7 n-grams split every context across blocks; the in-memory build (checked
    # against the dict reference in tests/test_lm_model.py) is the reference. Every method
    # but add-k (whose share needs the context) takes the blockwise path from bigrams up.
    monkeypatch.setattr(rawfiles, "BLOCK", 7)
    taken: list[bool] = []
    real = ondisk._smooth_blocks

    def spy(*args: Any) -> bool:
        taken.append(real(*args))
        return taken[-1]

    monkeypatch.setattr(ondisk, "_smooth_blocks", spy)
    plain = NGramModel(4, method).fit(SENTS)
    disk = NGramModel(4, method).fit(SENTS, memory=TINY, scratch=tmp_path)
    assert _bytes(disk, tmp_path, "disk.lm") == _bytes(plain, tmp_path, "plain.lm")
    assert disk.metadata_ == plain.metadata_
    assert taken == ([] if method == "addk" else [True, True, True])


def test_six_gram_byte_keys_byte_identical(tmp_path: Path) -> None:
    # 6 orders of 12-bit ids do not fit in 64 bits: the merge's byte-string keys (the
    # in-memory build is the reference)
    sents = _zipf_sentences(30_000, 3_000, 5)
    plain = NGramModel(6, "kn").fit(sents)
    disk = NGramModel(6, "kn").fit(sents, memory=TINY, scratch=tmp_path)
    assert _bytes(disk, tmp_path, "disk.lm") == _bytes(plain, tmp_path, "plain.lm")


def test_empty_top_orders_and_an_empty_text(tmp_path: Path) -> None:
    # one short sentence has no 4- or 5-grams (from memory: <s> a </s> holds one trigram);
    # the in-memory build is the reference
    for sents in ([["a"]], [[]], [["a", "b"], ["b"]]):
        plain = NGramModel(5).fit(sents)
        disk = NGramModel(5).fit(sents, memory=TINY, scratch=tmp_path)
        assert disk.n_ngrams_ == plain.n_ngrams_
        assert _bytes(disk, tmp_path, "disk.lm") == _bytes(plain, tmp_path, "plain.lm")


@pytest.mark.parametrize(("cutoffs", "prune", "expected"), [
    (None, None, True), ([1, 1], 0.0, True), ([2, 1], None, False), (None, 1e-7, False)])
def test_cutoffs_and_pruning_keep_the_in_memory_estimation(
        cutoffs: list[int] | None, prune: float | None, expected: bool) -> None:
    # common practice: a cutoff of 1 keeps every counted n-gram and a threshold of 0 prunes
    # nothing, so those settings change nothing and stay on disk
    assert ondisk.streams(cutoffs, prune) is expected


def test_full_disk_while_estimating_is_one_error(tmp_path: Path,
                                                 monkeypatch: pytest.MonkeyPatch) -> None:
    full_disk_for(monkeypatch, rawfiles, "prob")  # the probabilities' files meet a full disk
    with pytest.raises(InputError, match="no space left on device") as info:
        NGramModel(3).fit(SENTS, memory=TINY, scratch=tmp_path)
    assert info.value.path == str(tmp_path)
    assert list(tmp_path.iterdir()) == []


def test_the_fitted_model_is_the_mapped_file(tmp_path: Path) -> None:
    # the tables are views of the file written in the scratch folder (removed since): the
    # compact form that a loaded native file has (rescore/lm/store.py)
    model = NGramModel(3).fit(SENTS, memory=TINY, scratch=tmp_path)
    assert model.tables_.index is not None
    assert not model.tables_.logp[1].flags.writeable
    save_model(model, tmp_path / "m.lm")
    loaded = store.load_file(tmp_path / "m.lm", verify=True)
    assert loaded.tables.n_ngrams() == model.n_ngrams_
    assert [p.name for p in tmp_path.iterdir()] == ["m.lm"]


def test_arpa_of_a_build_within_a_budget_is_that_of_its_native_file(tmp_path: Path) -> None:
    # the ARPA format lists each order's n-grams in no fixed order (from memory): a build
    # within a budget writes them in its native file's order, the same bytes as converting
    # that file; the lines are those of the in-memory build
    disk = NGramModel(3).fit(SENTS, memory=TINY, scratch=tmp_path)
    save_model(disk, tmp_path / "disk.arpa")
    save_model(disk, tmp_path / "disk.lm")
    save_model(load_model(tmp_path / "disk.lm"), tmp_path / "converted.arpa")
    assert (tmp_path / "disk.arpa").read_bytes() == (tmp_path / "converted.arpa").read_bytes()
    save_model(NGramModel(3).fit(SENTS), tmp_path / "plain.arpa")
    lines = sorted((tmp_path / "disk.arpa").read_text().splitlines())
    assert lines == sorted((tmp_path / "plain.arpa").read_text().splitlines())
