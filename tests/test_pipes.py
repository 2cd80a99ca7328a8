"""Every reader and writer through a real pipe gives the bytes of the file route.

The inputs come down a pipe (``subprocess`` with ``stdin``), so the readers meet a stream
they cannot seek or reopen: ``-`` for standard input, ``/dev/stdin``, gzip recognised by
its bytes on a stream with no name. The expected output is the same command run on the
file itself, in the same test (the file route is the reference the users already trust).
"""

from __future__ import annotations

import gzip
import json
import os
import subprocess
import sys
import tempfile
from pathlib import Path

import pytest

from tests.conftest import FIXTURES, ROOT

DEMO = FIXTURES / "demo"


def _cli(args: list[str | Path], stdin: bytes | None = None, check: bool = True
         ) -> subprocess.CompletedProcess[bytes]:
    res = subprocess.run([sys.executable, "-m", "rescore", "-q", *map(str, args)],
                         input=stdin, capture_output=True, timeout=300, cwd=ROOT,
                         env={**os.environ, "PYTHONPATH": str(ROOT)})
    if check:
        assert res.returncode == 0, res.stderr.decode()
    return res


@pytest.fixture(scope="module")
def lm(tmp_path_factory: pytest.TempPathFactory) -> Path:
    path = tmp_path_factory.mktemp("pipes") / "demo.lm"
    _cli(["lm", "build", DEMO / "train.txt", "--order", "3", "-o", path])
    return path


@pytest.fixture(scope="module")
def weights(lm: Path) -> Path:
    path = lm.parent / "weights.json"
    _cli(["tune", DEMO / "dev.jsonl", "--lm", lm, "-o", path])
    return path


def _stream_copies() -> set[str]:
    return {p.name for p in Path(tempfile.gettempdir()).glob("rescore-stream-*")}


@pytest.mark.parametrize("route", ["-", "/dev/stdin", "gzip"])
def test_apply_reads_nbest_from_a_pipe(lm: Path, weights: Path, tmp_path: Path,
                                       route: str) -> None:
    before = _stream_copies()
    data = (DEMO / "test.jsonl").read_bytes()
    _cli(["apply", DEMO / "test.jsonl", "--lm", lm, "--weights", weights,
          "-o", tmp_path / "file.jsonl"])
    source = "-" if route == "gzip" else route
    piped = gzip.compress(data) if route == "gzip" else data
    _cli(["apply", source, "--lm", lm, "--weights", weights, "-o", tmp_path / "pipe.jsonl"],
         stdin=piped)
    assert (tmp_path / "pipe.jsonl").read_bytes() == (tmp_path / "file.jsonl").read_bytes()
    assert _stream_copies() <= before  # the temporary copy went with the process


def test_apply_workers_share_the_copy_of_a_pipe(lm: Path, weights: Path, tmp_path: Path
                                                ) -> None:
    _cli(["apply", DEMO / "test.jsonl", "--lm", lm, "--weights", weights,
          "-o", tmp_path / "file.jsonl"])
    _cli(["apply", "-", "--lm", lm, "--weights", weights, "-o", tmp_path / "pipe.jsonl",
          "--workers", "2", "--shard-mb", "0.01"], stdin=(DEMO / "test.jsonl").read_bytes())
    assert (tmp_path / "pipe.jsonl").read_bytes() == (tmp_path / "file.jsonl").read_bytes()


def test_apply_writes_to_stdout_and_reads_weights_from_a_pipe(
        lm: Path, weights: Path, tmp_path: Path) -> None:
    _cli(["apply", DEMO / "test.jsonl", "--lm", lm, "--weights", weights,
          "-o", tmp_path / "file.jsonl"])
    res = _cli(["apply", DEMO / "test.jsonl", "--lm", lm, "--weights", "-", "-o", "-"],
               stdin=weights.read_bytes())
    assert res.stdout == (tmp_path / "file.jsonl").read_bytes()


def test_check_and_tune_read_from_a_pipe(lm: Path, tmp_path: Path) -> None:
    dev = DEMO / "dev.jsonl"
    assert (_cli(["check", "-", "--json"], stdin=dev.read_bytes()).stdout
            == _cli(["check", dev, "--json"]).stdout)
    _cli(["tune", dev, "--lm", lm, "-o", tmp_path / "file.json"])
    _cli(["tune", "-", "--lm", lm, "-o", tmp_path / "pipe.json"], stdin=dev.read_bytes())
    by_file = json.loads((tmp_path / "file.json").read_text())
    by_pipe = json.loads((tmp_path / "pipe.json").read_text())
    # the provenance names the input as given ('-'); the bytes it read are the same
    file_sums = by_file["provenance"].pop("data_sha256")
    pipe_sums = by_pipe["provenance"].pop("data_sha256")
    assert by_pipe == by_file
    assert list(pipe_sums) == ["-"]
    assert list(pipe_sums.values()) == list(file_sums.values())


def test_wer_reads_references_from_a_pipe() -> None:
    # the references as 'id<TAB>text' lines, written from the N-best file's own references
    lines = []
    for line in (DEMO / "test.jsonl").read_text().splitlines():
        record = json.loads(line)
        if record.get("reference") is not None:
            lines.append(f"{record['id']}\t{record['reference']}\n")
    refs = "".join(lines).encode()
    with tempfile.NamedTemporaryFile(suffix=".tsv") as fh:
        fh.write(refs)
        fh.flush()
        by_file = _cli(["wer", DEMO / "test.jsonl", "--refs", fh.name, "--json"]).stdout
    by_pipe = _cli(["wer", DEMO / "test.jsonl", "--refs", "-", "--json"], stdin=refs).stdout
    assert by_pipe == by_file


def test_lm_build_perplexity_and_convert_through_pipes(lm: Path, tmp_path: Path) -> None:
    train = DEMO / "train.txt"
    _cli(["lm", "build", "-", "--order", "3", "-o", tmp_path / "pipe.lm"],
         stdin=gzip.compress(train.read_bytes()))
    assert (tmp_path / "pipe.lm").read_bytes() == lm.read_bytes()
    dev = DEMO / "dev.txt"
    assert (_cli(["lm", "perplexity", lm, "-", "--json"], stdin=dev.read_bytes()).stdout
            == _cli(["lm", "perplexity", lm, dev, "--json"]).stdout)
    # native -> ARPA on stdout -> native from stdin: the same ARPA text as the file route
    _cli(["lm", "convert", lm, tmp_path / "file.arpa"])
    arpa = _cli(["lm", "convert", lm, "-"]).stdout
    assert arpa == (tmp_path / "file.arpa").read_bytes()
    _cli(["lm", "convert", "-", tmp_path / "back.lm"], stdin=arpa)
    _cli(["lm", "convert", tmp_path / "back.lm", tmp_path / "back.arpa"])
    assert (tmp_path / "back.arpa").read_bytes() == arpa


def test_a_bad_record_on_a_pipe_is_named_by_the_stream(lm: Path, weights: Path,
                                                       tmp_path: Path) -> None:
    res = _cli(["apply", "-", "--lm", lm, "--weights", weights, "-o", tmp_path / "o.jsonl"],
               stdin=b'{"id": "a", "hypotheses": [}\n', check=False)
    assert res.returncode == 1
    message = res.stderr.decode().strip()
    assert message.startswith("error: -:1:") and "Traceback" not in message
    assert not (tmp_path / "o.jsonl").exists()


def test_tune_to_stdout_gives_the_weights_file_alone(lm: Path, tmp_path: Path) -> None:
    # a pipe downstream reads data, not a table: the weights on stdout are the bytes of
    # the file route, and the table goes to stderr (the Unix habit of stdout for data,
    # stderr for people; common practice)
    args = ["tune", DEMO / "dev.jsonl", "--lm", lm, "--grid-lm", "0:20:5",
            "--grid-penalty", "0:10:3", "--folds", "0"]
    _cli([*args, "-o", tmp_path / "w.json"])
    res = subprocess.run([sys.executable, "-m", "rescore", *map(str, args), "-o", "-"],
                         capture_output=True, timeout=300, cwd=ROOT,
                         env={**os.environ, "PYTHONPATH": str(ROOT)})
    assert res.returncode == 0, res.stderr.decode()
    assert json.loads(res.stdout) == json.loads((tmp_path / "w.json").read_bytes())
    assert b"LM weight" in res.stderr  # the table, for the person at the terminal


def test_json_and_data_on_stdout_are_refused_alike(lm: Path, weights: Path) -> None:
    for args in (["tune", DEMO / "dev.jsonl", "--lm", lm, "-o", "-", "--json"],
                 ["lm", "build", DEMO / "train.txt", "-o", "-", "--json"],
                 ["apply", DEMO / "test.jsonl", "--lm", lm, "--weights", weights,
                  "-o", "-", "--json"]):
        res = _cli(args, check=False)
        assert res.returncode == 2 and res.stdout == b"", args
        assert res.stderr.decode().strip().splitlines()[-1].startswith(
            "error: --json and the output - would both write to standard output"), args
