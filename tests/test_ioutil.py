"""Atomic outputs: a file appears whole or not at all."""

from __future__ import annotations

import gzip
import os
from pathlib import Path

import pytest

from rescore.errors import InputError
from rescore.ioutil import TMP_PREFIX, atomic_output, iter_text_lines


def test_output_appears_only_when_complete(tmp_path: Path) -> None:
    out = tmp_path / "out.txt"
    with atomic_output(out) as fh:
        fh.write("partial")  # type: ignore[arg-type]
        assert not out.exists()
    assert out.read_text() == "partial"


def test_error_inside_leaves_no_output_and_no_temporary(tmp_path: Path) -> None:
    out = tmp_path / "out.txt"
    out.write_text("previous")
    with pytest.raises(KeyboardInterrupt), atomic_output(out) as fh:
        fh.write("half")  # type: ignore[arg-type]
        raise KeyboardInterrupt
    assert out.read_text() == "previous"
    assert sorted(p.name for p in tmp_path.iterdir()) == ["out.txt"]


def test_gzip_output_is_reproducible(tmp_path: Path) -> None:
    # gzip header timestamp fixed at zero (RFC 1952 MTIME = 0: no time stamp available)
    for name in ("a.txt.gz", "b.txt.gz"):
        with atomic_output(tmp_path / name) as fh:
            fh.write("row two\n")  # type: ignore[arg-type]
    a, b = (tmp_path / "a.txt.gz").read_bytes(), (tmp_path / "b.txt.gz").read_bytes()
    assert a == b and gzip.decompress(a) == b"row two\n"


def test_stale_temporary_of_a_dead_writer_is_removed(tmp_path: Path) -> None:
    dead = 2**22 + 12345  # above the default pid_max of Linux (from memory): never alive
    stale = tmp_path / f"{TMP_PREFIX}out.txt.{dead}.abc"
    alive = tmp_path / f"{TMP_PREFIX}out.txt.{os.getpid()}.xyz"
    stale.write_text("x")
    alive.write_text("y")
    with atomic_output(tmp_path / "out.txt") as fh:
        fh.write("z")  # type: ignore[arg-type]
    assert not stale.exists() and alive.exists()


def test_missing_output_folder_is_a_clean_error(tmp_path: Path) -> None:
    with pytest.raises(InputError, match="output folder does not exist"), \
            atomic_output(tmp_path / "no" / "out.txt"):
        pass


def test_over_long_line_is_refused(tmp_path: Path) -> None:
    path = tmp_path / "long.txt"
    path.write_text("short\n" + "x" * 100 + "\n")
    with pytest.raises(InputError, match="line longer than the limit of 50 bytes") as info:
        list(iter_text_lines(path, max_line_bytes=50))
    assert info.value.line == 2
