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
