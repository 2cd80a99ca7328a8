"""Process-wide settings of the command line."""

from __future__ import annotations

import pytest

from rescore.process import HUGEPAGE_ENV, avoid_huge_pages


def test_user_choice_of_huge_pages_wins(monkeypatch: pytest.MonkeyPatch) -> None:
    # numpy reads NUMPY_MADVISE_HUGEPAGE (numpy documentation, from memory); a value the
    # user set is left alone and numpy's setting is not touched
    monkeypatch.setenv(HUGEPAGE_ENV, "1")
    assert avoid_huge_pages() is False
    import os

    assert os.environ[HUGEPAGE_ENV] == "1"


def test_huge_page_advice_turned_off_for_this_and_later_processes(
        monkeypatch: pytest.MonkeyPatch) -> None:
    import os

    import numpy as np

    monkeypatch.delenv(HUGEPAGE_ENV, raising=False)
    setter = np._core.multiarray._set_madvise_hugepage
    before = setter(True)  # returns the previous value; make it True for the check
    try:
        assert avoid_huge_pages() is True
        assert os.environ[HUGEPAGE_ENV] == "0"  # inherited by worker processes
        assert setter(True) is False  # what avoid_huge_pages left in force
    finally:
        setter(before)
        monkeypatch.delenv(HUGEPAGE_ENV, raising=False)


def test_user_malloc_settings_win(monkeypatch: pytest.MonkeyPatch) -> None:
    # glibc reads MALLOC_MMAP_MAX_ and friends at start-up (mallopt(3), from memory); a
    # process started with any of them keeps the user's choice
    from rescore.process import keep_freed_memory

    monkeypatch.setenv("MALLOC_TRIM_THRESHOLD_", "0")
    assert keep_freed_memory() is False


def test_freed_memory_kept_on_glibc(monkeypatch: pytest.MonkeyPatch) -> None:
    import ctypes
    import sys

    from rescore.process import _MALLOC_ENV, keep_freed_memory

    for name in _MALLOC_ENV:
        monkeypatch.delenv(name, raising=False)
    libc = ctypes.CDLL(None)
    if not sys.platform.startswith("linux") or not hasattr(libc, "gnu_get_libc_version"):
        pytest.skip("not glibc")
    # mallopt returns 1 on success for both parameters (mallopt(3), from memory)
    assert keep_freed_memory() is True
