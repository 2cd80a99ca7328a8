"""Atomic outputs: a file appears whole or not at all."""

from __future__ import annotations

import gzip
import os
from pathlib import Path

import pytest
from hypothesis import given, settings
from hypothesis import strategies as st

from rescore.errors import InputError
from rescore.leftovers import TMP_PREFIX
from rescore.outputs import atomic_output
from rescore.readers import iter_text_lines


def test_output_appears_only_when_complete(tmp_path: Path) -> None:
    out = tmp_path / "out.txt"
    with atomic_output(out) as fh:
        fh.write("partial")
        assert not out.exists()
    assert out.read_text() == "partial"


def test_error_inside_leaves_no_output_and_no_temporary(tmp_path: Path) -> None:
    out = tmp_path / "out.txt"
    out.write_text("previous")
    with pytest.raises(KeyboardInterrupt), atomic_output(out) as fh:
        fh.write("half")
        raise KeyboardInterrupt
    assert out.read_text() == "previous"
    assert sorted(p.name for p in tmp_path.iterdir()) == ["out.txt"]


def test_gzip_output_is_reproducible(tmp_path: Path) -> None:
    # gzip header timestamp fixed at zero (RFC 1952 MTIME = 0: no time stamp available)
    for name in ("a.txt.gz", "b.txt.gz"):
        with atomic_output(tmp_path / name) as fh:
            fh.write("row two\n")
    a, b = (tmp_path / "a.txt.gz").read_bytes(), (tmp_path / "b.txt.gz").read_bytes()
    assert a == b and gzip.decompress(a) == b"row two\n"


def test_stale_temporary_of_a_dead_writer_is_removed(tmp_path: Path) -> None:
    dead = 2**22 + 12345  # above the default pid_max of Linux (from memory): never alive
    stale = tmp_path / f"{TMP_PREFIX}out.txt.{dead}.abc"
    alive = tmp_path / f"{TMP_PREFIX}out.txt.{os.getpid()}.xyz"
    stale.write_text("x")
    alive.write_text("y")
    with atomic_output(tmp_path / "out.txt") as fh:
        fh.write("z")
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


def test_line_shards_cover_the_file_at_line_starts(tmp_path: Path) -> None:
    # plain check: concatenating the shards' lines gives every line once, numbered right
    path = tmp_path / "lines.txt"
    lines = [f"line {i} " + "x" * (i % 37) for i in range(5000)]
    path.write_text("\n".join(lines) + "\n")
    from rescore.shards import line_shards

    shards = line_shards(path, parts=7, min_bytes=1000)
    assert len(shards) == 7
    got = [pair for a, b, first in shards
           for pair in iter_text_lines(path, start=a, end=b, first_line=first)]
    assert got == list(enumerate(lines, start=1))


def test_line_shards_of_a_small_file_is_one_shard(tmp_path: Path) -> None:
    from rescore.shards import line_shards

    path = tmp_path / "small.txt"
    path.write_text("a\nb\n")
    assert line_shards(path, parts=4) == [(0, 4, 1)]


def test_output_has_ordinary_file_mode(tmp_path: Path) -> None:
    # POSIX: open() creates files with mode 0666 masked by the umask
    out = tmp_path / "out.txt"
    with atomic_output(out) as fh:
        fh.write("x")
    mask = os.umask(0)
    os.umask(mask)
    assert out.stat().st_mode & 0o777 == 0o666 & ~mask


def test_outputs_of_a_set_appear_together(tmp_path: Path) -> None:
    from rescore.outputs import atomic_outputs

    a, b = tmp_path / "a.txt", tmp_path / "b.txt.gz"
    with atomic_outputs([a, b]) as (fa, fb):
        fa.write("first")
        fb.write("second")
        assert not a.exists() and not b.exists()
    assert a.read_text() == "first" and gzip.decompress(b.read_bytes()) == b"second"


def test_error_in_a_set_leaves_every_previous_file(tmp_path: Path) -> None:
    from rescore.outputs import atomic_outputs

    a, b = tmp_path / "a.txt", tmp_path / "b.txt"
    a.write_text("old a")
    b.write_text("old b")
    with pytest.raises(KeyboardInterrupt), atomic_outputs([a, b]) as (fa, fb):
        fa.write("new a")
        fb.write("new b")
        raise KeyboardInterrupt
    assert (a.read_text(), b.read_text()) == ("old a", "old b")
    assert sorted(p.name for p in tmp_path.iterdir()) == ["a.txt", "b.txt"]


def test_a_set_refuses_a_folder_before_writing_anything(tmp_path: Path) -> None:
    from rescore.outputs import atomic_outputs

    (tmp_path / "b").mkdir()
    with pytest.raises(InputError, match="is a folder, expected a file path"), \
            atomic_outputs([tmp_path / "a.txt", tmp_path / "b"]):
        pass
    assert sorted(p.name for p in tmp_path.iterdir()) == ["b"]


def test_a_set_refuses_the_same_file_twice(tmp_path: Path) -> None:
    from rescore.errors import UsageError
    from rescore.outputs import atomic_outputs

    with pytest.raises(UsageError, match="are one file: each output of a command must be"), \
            atomic_outputs([tmp_path / "a.txt", tmp_path / "." / "a.txt"]):
        pass
    assert list(tmp_path.iterdir()) == []


_LINE_BYTES = st.lists(st.sampled_from([b"a", b"bc", b" ", b"\r", b"\n", b"\n", b"\xc3\xa9",
                                        b"\xff", b"\xc3", b"x" * 7]), max_size=40).map(b"".join)


@settings(max_examples=300)
@given(_LINE_BYTES, st.sampled_from([4, 9, 64]), st.sampled_from([None, 6, 12]),
       st.booleans())
def test_text_blocks_hold_the_lines_of_the_line_reader(
        data: bytes, block: int, cap: int | None, gz: bool) -> None:
    # the rule is iter_text_lines: the same lines, numbers and line endings (a \r before
    # \n kept in blocks, stripped by lines: compare without it) and the same error, at the
    # same line, with bad UTF-8, over-long lines and tiny blocks
    import tempfile

    from rescore.readers import iter_text_blocks

    with tempfile.TemporaryDirectory() as tmp:
        path = Path(tmp) / ("t.txt.gz" if gz else "t.txt")
        path.write_bytes(gzip.compress(data) if gz else data)

        def lines() -> list[tuple[int, str]]:
            return list(iter_text_lines(path, cap))

        def from_blocks() -> list[tuple[int, str]]:
            out = []
            for first, chunk in iter_text_blocks(path, cap, block_bytes=block):
                out += [(first + i, line.decode("utf-8").rstrip("\r"))
                        for i, line in enumerate(chunk.split(b"\n"))]
            return out

        try:
            want: list[tuple[int, str]] | tuple[str, int | None] = \
                [(n, t.rstrip("\r")) for n, t in lines()]
        except InputError as exc:
            want = (str(exc), exc.line)
        try:
            got: list[tuple[int, str]] | tuple[str, int | None] = from_blocks()
        except InputError as exc:
            got = (str(exc), exc.line)
        assert got == want
