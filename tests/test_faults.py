"""Faults of the environment and hostile files, one case each: full disks, a killed main
process, damaged gzip in the worker path, scores that overflow, decompression bombs,
unreadable inputs.

Each case states what it checks. The expected error lines are the project's own contract
(README "Guarantees": ``error: PATH[:LINE][: FIELD]: what is wrong``, exit 1).
"""

from __future__ import annotations

import ctypes
import errno
import fcntl
import gzip
import io
import os
import re
import resource
import shutil
import signal
import subprocess
import sys
import time
from collections.abc import Callable, Iterator
from pathlib import Path
from typing import Any

import psutil
import pytest

from rescore import leftovers, outputs
from rescore.errors import InputError
from rescore.leftovers import TMP_PREFIX
from rescore.readers import inflate
from tests.bulk import write_bulk, write_long_run
from tests.conftest import FIXTURES, ROOT, run

DEMO = FIXTURES / "demo"
FULL = re.compile(r"error: (?P<path>.+): no space left on device(?P<why>: [a-z ]+)? "
                  r"\((?P<n>\d+) bytes written\)")


def _cli(args: list[str], preexec: Callable[[], None] | None = None,
         env: dict[str, str] | None = None, timeout: float = 300
         ) -> subprocess.CompletedProcess[str]:
    return subprocess.run([sys.executable, "-m", "rescore", "-q", *args], capture_output=True,
                          text=True, timeout=timeout, preexec_fn=preexec, cwd=ROOT,
                          env={**os.environ, "PYTHONPATH": str(ROOT), **(env or {})})


def _last_line(err: str) -> str:
    lines = err.strip().splitlines()
    return lines[-1] if lines else ""


@pytest.fixture(scope="module")
def demo_models(tmp_path_factory: pytest.TempPathFactory) -> dict[str, Path]:
    """A small trigram model of the demo training text and weights that use it."""
    folder = tmp_path_factory.mktemp("models")
    model = folder / "logbook.lm"
    assert run(["lm", "build", DEMO / "train.txt", "--order", "3", "-o", model]).exit_code == 0
    weights = folder / "w.json"
    weights.write_text('{"acoustic_scale": 1.0, "lm_weight": 5.0, "insertion_penalty": 0.0, '
                       '"features": {}}')
    gz = folder / "test.jsonl.gz"
    gz.write_bytes(gzip.compress((DEMO / "test.jsonl").read_bytes(), mtime=0))
    return {"model": model, "weights": weights, "gz": gz}


def _leftovers(folder: Path) -> list[str]:
    return sorted(p.name for p in folder.rglob("*") if p.name.startswith(TMP_PREFIX))


# --- 1. full disks ------------------------------------------------------------------------

@pytest.fixture
def disk_holding(monkeypatch: pytest.MonkeyPatch) -> Iterator[int]:
    """Every temporary output file takes 512 bytes, then the write fails as a full disk
    does: a short write of what fits, then ENOSPC (write(2): "ENOSPC ... no room")."""
    room = 512

    def write(self: Any, data: Any, /) -> int:
        left = room - self.written
        if left <= 0:
            err = OSError(errno.ENOSPC, os.strerror(errno.ENOSPC))
            if self.error is None:
                self.error = err
            raise err
        part = memoryview(data)[:left]
        n = os.write(self.fileno(), part)
        self.written += n
        return n

    monkeypatch.setattr(outputs._CountingFile, "write", write)
    yield room


def _disk_cases(tmp: Path, models: dict[str, Path]) -> list[tuple[str, list[str], Path]]:
    m, w = str(models["model"]), str(models["weights"])
    test, dev = str(DEMO / "test.jsonl"), str(DEMO / "dev.jsonl")
    return [
        ("apply -o", ["apply", test, "--lm", m, "--weights", w, "-o", str(tmp / "o.jsonl")],
         tmp / "o.jsonl"),
        ("apply -o .gz", ["apply", test, "--lm", m, "--weights", w, "-o",
                          str(tmp / "o.jsonl.gz")], tmp / "o.jsonl.gz"),
        ("apply --text", ["apply", test, "--lm", m, "--weights", w, "-o",
                          str(tmp / "o2.jsonl"), "--text", str(tmp / "o2.tsv")],
         tmp / "o2.jsonl"),
        ("lm build", ["lm", "build", str(DEMO / "train.txt"), "-o", str(tmp / "x.lm")],
         tmp / "x.lm"),
        ("lm convert", ["lm", "convert", m, str(tmp / "x.arpa")], tmp / "x.arpa"),
        ("lm perplexity --per-sentence",
         ["lm", "perplexity", m, str(DEMO / "dev.txt"), "--per-sentence",
          str(tmp / "s.tsv")], tmp / "s.tsv"),
        ("tune -o --analysis", ["tune", dev, "--lm", m, "-o", str(tmp / "t.json"),
                                "--analysis", str(tmp / "a.json"), "--folds", "0",
                                "--grid-lm", "0:10:5", "--grid-penalty", "-2:2:3"],
         tmp / "t.json"),
        ("report -o DIR", ["report", "--before", test, "--after", test, "-o",
                           str(tmp / "rep"), "--resamples", "50"], tmp / "rep" / "report.json"),
    ]


@pytest.mark.parametrize("case", range(8), ids=[
    "apply -o", "apply -o .gz", "apply --text", "lm build", "lm convert",
    "lm perplexity --per-sentence", "tune -o --analysis", "report -o DIR"])
def test_disk_full_at_the_writer_seam_is_one_line_and_keeps_the_old_output(
        case: int, tmp_path: Path, demo_models: dict[str, Path], disk_holding: int) -> None:
    """Checks: a full disk during any output ends in `error: PATH: no space left on device
    (N bytes written)`, exit 1; a previous file at the path is untouched; no temporary."""
    name, args, target = _disk_cases(tmp_path, demo_models)[case]
    target.parent.mkdir(exist_ok=True)
    target.write_text("previous\n")
    result = run(args)
    assert result.exit_code == 1, (name, result.output)
    match = FULL.fullmatch(_last_line(result.stderr))
    assert match, result.stderr
    assert int(match["n"]) <= disk_holding
    assert target.read_text() == "previous\n"
    assert _leftovers(tmp_path) == []


def test_disk_full_inside_a_set_keeps_every_file_of_the_set(
        tmp_path: Path, demo_models: dict[str, Path], disk_holding: int) -> None:
    """Checks: tune's weights and analysis are a set; with the analysis failing, a new
    weights file does not appear beside the old analysis."""
    weights, analysis = tmp_path / "t.json", tmp_path / "a.json"
    result = run(["tune", DEMO / "dev.jsonl", "--lm", demo_models["model"], "-o", weights,
                  "--analysis", analysis, "--folds", "0", "--grid-lm", "0:10:5",
                  "--grid-penalty", "-2:2:3"])
    assert result.exit_code == 1
    assert FULL.fullmatch(_last_line(result.stderr))
    assert sorted(p.name for p in tmp_path.iterdir()) == []


def test_report_folder_made_for_a_failed_report_is_removed(
        tmp_path: Path, disk_holding: int) -> None:
    """Checks: `report -o NEW_DIR` on a full disk leaves no empty report folder behind."""
    test = DEMO / "test.jsonl"
    result = run(["report", "--before", test, "--after", test, "-o", tmp_path / "rep",
                  "--resamples", "50"])
    assert result.exit_code == 1 and FULL.fullmatch(_last_line(result.stderr))
    assert not (tmp_path / "rep").exists()


def _file_size_limit(limit: int) -> Callable[[], None]:
    def child() -> None:
        # past RLIMIT_FSIZE the kernel sends SIGXFSZ, which kills by default; ignored, the
        # write fails with EFBIG instead (setrlimit(2), "RLIMIT_FSIZE")
        signal.signal(signal.SIGXFSZ, signal.SIG_IGN)
        resource.setrlimit(resource.RLIMIT_FSIZE, (limit, limit))
    return child


@pytest.mark.parametrize("extra", [[], ["--workers", "2", "--shard-mb", "0.1"], ["gz"]],
                         ids=["one process", "--workers 2", "--workers 2 gzip input"])
def test_file_size_limit_without_root_is_the_same_one_line(
        extra: list[str], tmp_path: Path, demo_models: dict[str, Path]) -> None:
    """Checks, in a child process under RLIMIT_FSIZE (no root needed): apply in one process
    and with workers (shards, and a gzip input inflated to scratch) ends in the disk-full
    line naming the output; nothing is left in the output folder but the old file."""
    src = DEMO / "test.jsonl"
    if extra == ["gz"]:
        src, extra = demo_models["gz"], ["--workers", "2", "--shard-mb", "0.1"]
    out = tmp_path / "o.jsonl"
    out.write_text("previous\n")
    done = _cli(["apply", str(src), "--lm", str(demo_models["model"]), "--weights",
                 str(demo_models["weights"]), "-o", str(out), *extra],
                preexec=_file_size_limit(200_000))
    assert done.returncode == 1, done.stderr
    match = FULL.fullmatch(_last_line(done.stderr))
    assert match and match["path"] == str(out), done.stderr
    assert match["why"] == ": file size limit reached"
    assert out.read_text() == "previous\n"
    assert sorted(p.name for p in tmp_path.iterdir()) == ["o.jsonl"]


@pytest.fixture
def tiny_tmpfs(tmp_path: Path) -> Iterator[Path]:
    if os.geteuid() != 0:
        pytest.skip("mounting a tmpfs needs root")
    mnt = tmp_path / "mnt"
    mnt.mkdir()
    mounted = subprocess.run(["mount", "-t", "tmpfs", "-o", "size=96k", "tmpfs", str(mnt)],
                             capture_output=True, text=True)
    if mounted.returncode != 0:
        pytest.skip(f"mount -t tmpfs not permitted here: {mounted.stderr.strip()}")
    try:
        yield mnt
    finally:
        subprocess.run(["umount", str(mnt)], check=False)


@pytest.mark.parametrize("extra", [[], ["--workers", "2", "--shard-mb", "0.1"]],
                         ids=["one process", "--workers 2"])
def test_real_full_disk_on_a_tiny_tmpfs(extra: list[str], tiny_tmpfs: Path,
                                        demo_models: dict[str, Path]) -> None:
    """Checks, on a real 96 KiB tmpfs (root only): ENOSPC from the kernel gives the one
    line, the old output stays and the file system is left as it was."""
    out = tiny_tmpfs / "o.jsonl"
    out.write_text("previous\n")
    done = _cli(["apply", str(DEMO / "test.jsonl"), "--lm", str(demo_models["model"]),
                 "--weights", str(demo_models["weights"]), "-o", str(out), *extra])
    assert done.returncode == 1
    match = FULL.fullmatch(_last_line(done.stderr))
    assert match and match["path"] == str(out) and match["why"] is None, done.stderr
    assert out.read_text() == "previous\n"
    assert sorted(p.name for p in tiny_tmpfs.iterdir()) == ["o.jsonl"]


# --- 2. killed main process ------------------------------------------------------------------

@pytest.fixture(scope="module")
def big(tmp_path_factory: pytest.TempPathFactory) -> tuple[Path, Path]:
    return write_long_run(tmp_path_factory.mktemp("big"))


def _alive(pids: list[int]) -> list[int]:
    living = []
    for pid in pids:
        try:
            if psutil.Process(pid).status() != psutil.STATUS_ZOMBIE:
                living.append(pid)
        except psutil.NoSuchProcess:
            pass
    return living


def test_sigkill_of_the_main_process_ends_its_workers_and_the_next_run_cleans_up(
        big: tuple[Path, Path], tmp_path: Path) -> None:
    """Checks: `apply --workers 2` killed with SIGKILL leaves no worker running (they get
    SIGKILL from the kernel, PR_SET_PDEATHSIG); its scratch folder, whose lock died with it,
    is removed by the next run writing the same output."""
    out = tmp_path / "o.jsonl"
    proc = subprocess.Popen([sys.executable, "-m", "rescore", "-q", "apply", str(big[0]),
                             "--weights", str(big[1]), "-o", str(out), "--workers", "2",
                             "--shard-mb", "1"], cwd=ROOT,
                            env={**os.environ, "PYTHONPATH": str(ROOT)},
                            stdout=subprocess.DEVNULL, stderr=subprocess.DEVNULL)
    deadline = time.monotonic() + 60
    children: list[int] = []
    while time.monotonic() < deadline and proc.poll() is None:
        children = [c.pid for c in psutil.Process(proc.pid).children(recursive=True)]
        if len(children) >= 2 and any(p.suffix == ".jsonl" for p in tmp_path.rglob("0*")):
            break
        time.sleep(0.05)
    else:
        pytest.fail("apply finished or stalled before its workers wrote shards")
    os.kill(proc.pid, signal.SIGKILL)
    proc.wait(timeout=30)
    deadline = time.monotonic() + 10
    while _alive(children) and time.monotonic() < deadline:
        time.sleep(0.05)
    assert _alive(children) == []
    left = _leftovers(tmp_path)
    assert left and not out.exists()
    small = tmp_path.parent / "small-faults.jsonl"
    write_bulk(small, 10)
    done = _cli(["apply", str(small), "--weights", str(big[1]), "-o", str(out)])
    assert done.returncode == 0, done.stderr
    assert sorted(p.name for p in tmp_path.iterdir()) == ["o.jsonl"]


def _hold_lock(path: Path) -> subprocess.Popen[str]:
    """A separate process that holds the flock of ``path`` until its stdin closes."""
    code = ("import fcntl, os, sys; fd = os.open(sys.argv[1], os.O_RDONLY); "
            "fcntl.flock(fd, fcntl.LOCK_EX); print('held', flush=True); sys.stdin.read()")
    holder = subprocess.Popen([sys.executable, "-c", code, str(path)], stdin=subprocess.PIPE,
                              stdout=subprocess.PIPE, text=True)
    assert holder.stdout is not None and holder.stdout.readline().strip() == "held"
    return holder


def test_a_leftover_whose_lock_is_held_is_kept_even_when_its_pid_looks_dead(
        tmp_path: Path) -> None:
    """Checks: a scratch folder whose pid is not alive here (as from another PID namespace)
    but whose lock a living process holds is not removed; once the lock is free, it is."""
    dead = 2**22 + 4321  # above Linux's largest pid_max, 2^22 (proc(5), from memory)
    scratch = tmp_path / f"{TMP_PREFIX}o.jsonl.{dead}.shards.abc"
    scratch.mkdir()
    (scratch / leftovers.SCRATCH_LOCK).write_text("")
    (scratch / "00000.jsonl").write_text("shard\n")
    holder = _hold_lock(scratch / leftovers.SCRATCH_LOCK)
    try:
        outputs.write_text_atomic(tmp_path / "o.jsonl", "x\n")
        assert scratch.is_dir()
    finally:
        assert holder.stdin is not None and holder.stdout is not None
        holder.stdin.close()
        holder.wait(timeout=10)
        holder.stdout.close()
    outputs.write_text_atomic(tmp_path / "o.jsonl", "y\n")
    assert not scratch.exists()


def test_a_temporary_being_written_is_locked_for_its_writer(tmp_path: Path) -> None:
    """Checks: while an output is open its temporary's flock is taken (so no later run can
    prove it dead), and it is gone with the output's completion."""
    with outputs.atomic_output(tmp_path / "o.txt") as fh:
        fh.write("z")
        (tmp,) = [p for p in tmp_path.iterdir() if p.name.startswith(TMP_PREFIX)]
        fd = os.open(tmp, os.O_RDONLY)
        try:
            with pytest.raises(BlockingIOError):
                fcntl.flock(fd, fcntl.LOCK_EX | fcntl.LOCK_NB)
        finally:
            os.close(fd)
    assert [p.name for p in tmp_path.iterdir()] == ["o.txt"]


# --- 3. damaged gzip in the worker path --------------------------------------------------------

def _damaged(kind: str, source: Path, folder: Path) -> Path:
    data = bytearray(source.read_bytes())
    if kind == "truncated":
        data = data[: len(data) // 2]
    else:  # RFC 1952: the member ends in CRC32 then ISIZE, 4 bytes each; spoil the CRC
        data[-8] ^= 0xFF
    path = folder / f"{kind}.jsonl.gz"
    path.write_bytes(bytes(data))
    return path


@pytest.mark.parametrize("kind", ["truncated", "crc"])
def test_damaged_gzip_gives_the_same_line_with_and_without_workers(
        kind: str, tmp_path: Path, demo_models: dict[str, Path]) -> None:
    """Checks: a truncated or CRC-damaged .jsonl.gz is the same one-line input error, line
    included, in one process and with --workers 2; no output, no scratch left."""
    src = _damaged(kind, demo_models["gz"], tmp_path)
    lines = []
    for extra in ([], ["--workers", "2"]):
        result = run(["apply", src, "--lm", demo_models["model"], "--weights",
                      demo_models["weights"], "-o", tmp_path / "o.jsonl", *extra])
        assert result.exit_code == 1
        lines.append(_last_line(result.stderr))
    assert lines[0] == lines[1]
    assert re.fullmatch(rf"error: {re.escape(str(src))}:\d+: cannot read compressed data \(.+\)",
                        lines[0])
    assert sorted(p.name for p in tmp_path.iterdir()) == [src.name]


# --- 5. scores that overflow on conversion -------------------------------------------------------

@pytest.mark.parametrize(("header", "hyp", "field", "factor"), [
    # ln(1e300) = 690.776; -1e307 * 690.776 = -6.9e309, beyond DBL_MAX 1.8e308 (IEEE 754
    # binary64); costs flip the sign (factor -690.776)
    ('{"log_base": 1e300}', '{"text": "a", "acoustic": -1e307}', "hypotheses[0].acoustic",
     "690.776"),
    ('{"log_base": 1e300, "scores_are_costs": true}',
     '{"text": "a", "acoustic": 1.0, "features": {"f": 1e307}}', "hypotheses[0].features.f",
     "-690.776"),
], ids=["acoustic", "feature"])
def test_score_that_overflows_once_converted_names_its_line(
        header: str, hyp: str, field: str, factor: str, tmp_path: Path) -> None:
    """Checks: a score finite in the file but infinite once converted to natural log is an
    input error naming line and field, not a non-finite total."""
    path = tmp_path / "n.jsonl"
    path.write_text(f'{{"nbest_header": {header}}}\n'
                    f'{{"id": "u1", "reference": "a", "hypotheses": [{hyp}]}}\n')
    result = run(["check", path])
    assert result.exit_code == 1
    assert _last_line(result.stderr) == (
        f"error: {path}:2: {field}: score out of range once converted to natural log "
        f"(times {factor})")


# --- 6. bombs ------------------------------------------------------------------------------------

@pytest.fixture(scope="module")
def newline_bomb(tmp_path_factory: pytest.TempPathFactory) -> Path:
    """1,200,000 line breaks and then one record, gzip-compressed (about 1.2 KB)."""
    path = tmp_path_factory.mktemp("bomb") / "blank.jsonl.gz"
    record = (DEMO / "test.jsonl").read_text().splitlines()[0]
    path.write_bytes(gzip.compress(b"\n" * 1_200_000 + record.encode() + b"\n", mtime=0))
    return path


def test_blank_line_run_is_refused_the_same_with_and_without_workers(
        newline_bomb: Path, tmp_path: Path, demo_models: dict[str, Path]) -> None:
    """Checks: more than 1,000,000 blank lines in a row (the documented cap) are refused
    at line 1,000,001, in one process and with --workers 2 alike."""
    lines = []
    for extra in ([], ["--workers", "2"]):
        result = run(["apply", newline_bomb, "--lm", demo_models["model"], "--weights",
                      demo_models["weights"], "-o", tmp_path / "o.jsonl", *extra])
        assert result.exit_code == 1
        lines.append(_last_line(result.stderr))
    assert lines[0] == lines[1] == (f"error: {newline_bomb}:1000001: more than 1,000,000 "
                                    "blank lines in a row (from line 1)")
    assert list(tmp_path.iterdir()) == []


@pytest.fixture(scope="module")
def wide_bomb(tmp_path_factory: pytest.TempPathFactory) -> Path:
    """One valid record padded with 20 MiB of JSON whitespace: about 20 KB of gzip, over
    the 16 MiB floor and 100 times its compressed size."""
    path = tmp_path_factory.mktemp("bomb") / "wide.jsonl.gz"
    line = '{"id": "u1", ' + " " * (20 << 20) + '"hypotheses": [{"text": "a", "acoustic": -1}]}'
    path.write_bytes(gzip.compress(line.encode() + b"\n", mtime=0))
    return path


def test_gzip_unpacking_past_the_ratio_cap_is_refused_and_the_cap_is_settable(
        wide_bomb: Path, tmp_path: Path) -> None:
    """Checks: a gzip input unpacking to more than max(16 MiB, 100 x compressed) is refused
    with a line naming the setting, in one process and with workers; the setting lifts it
    (0) and a malformed setting is a usage error (exit 2)."""
    ratio = wide_bomb.stat().st_size * 100
    assert ratio < (20 << 20) and (16 << 20) < (20 << 20)  # the file does break the cap
    refused = _cli(["check", str(wide_bomb)])
    assert refused.returncode == 1
    assert _last_line(refused.stderr) == (
        f"error: {wide_bomb}:1: gzip data unpacks to more than 16 MiB, over 100 times its "
        "compressed size (a decompression bomb?); set RESCORE_GZIP_MAX_RATIO to allow more")
    lifted = _cli(["check", str(wide_bomb)], env={"RESCORE_GZIP_MAX_RATIO": "0"})
    assert lifted.returncode == 0, lifted.stderr
    bad = _cli(["check", str(wide_bomb)], env={"RESCORE_GZIP_MAX_RATIO": "lots"})
    assert bad.returncode == 2
    assert "RESCORE_GZIP_MAX_RATIO='lots': expected a whole number" in bad.stderr


def test_gzip_ratio_cap_holds_in_the_worker_path(wide_bomb: Path, tmp_path: Path) -> None:
    """Checks: `apply --workers 2` refuses the same bomb with the same line as one process."""
    weights = tmp_path.parent / "wb.json"
    weights.write_text('{"acoustic_scale": 1.0, "lm_weight": 0.0, "insertion_penalty": 0.0, '
                       '"features": {}}')
    lines = []
    for extra in ([], ["--workers", "2"]):
        done = _cli(["apply", str(wide_bomb), "--weights", str(weights), "-o",
                     str(tmp_path / "o.jsonl"), *extra])
        assert done.returncode == 1
        lines.append(_last_line(done.stderr))
    assert lines[0] == lines[1] and "gzip data unpacks to more than 16 MiB" in lines[0]
    assert list(tmp_path.iterdir()) == []


class _Counting(io.RawIOBase):
    def __init__(self) -> None:
        self.size = 0

    def writable(self) -> bool:
        return True

    def write(self, data: Any, /) -> int:
        self.size += len(data)
        return len(data)


def test_inflating_a_newline_bomb_stops_early(tmp_path: Path) -> None:
    """Checks: the worker path's inflation of 64 MiB of line breaks (64 KB of gzip) writes
    no more than the blank-line cap and one 1 MiB block before refusing, not 64 MiB."""
    path = tmp_path / "nl.jsonl.gz"
    path.write_bytes(gzip.compress(b"\n" * (64 << 20), mtime=0))
    sink = _Counting()
    with pytest.raises(InputError, match="blank lines in a row"):
        inflate(path, sink, None)
    assert sink.size <= 1_000_000 + (1 << 20)


# --- 7. unreadable inputs -------------------------------------------------------------------------

PR_CAPBSET_DROP = 24  # <linux/prctl.h>
CAP_DAC_OVERRIDE, CAP_DAC_READ_SEARCH = 1, 2  # <linux/capability.h>


def _without_file_override() -> None:
    """In the child: as root, drop the two capabilities that bypass file modes from the
    bounding set, so the program exec'd next is refused an unreadable file."""
    if os.geteuid() == 0:
        libc = ctypes.CDLL(None, use_errno=True)
        for cap in (CAP_DAC_OVERRIDE, CAP_DAC_READ_SEARCH):
            if libc.prctl(PR_CAPBSET_DROP, cap, 0, 0, 0) != 0:
                os._exit(77)


@pytest.mark.parametrize("where", ["nbest", "--refs", "--weights", "model", "lm build text"])
def test_unreadable_input_is_one_line_exit_1(where: str, tmp_path: Path,
                                             demo_models: dict[str, Path]) -> None:
    """Checks: an input without read permission is `error: PATH: permission denied`, exit
    1, like a missing file (not the parser's usage box, exit 2)."""
    locked = tmp_path / "locked"
    shutil.copy(DEMO / "test.jsonl", locked)
    locked.chmod(0)
    test, m = str(DEMO / "test.jsonl"), str(demo_models["model"])
    o = str(tmp_path / "o")
    args = {"nbest": ["check", str(locked)],
            "--refs": ["wer", test, "--refs", str(locked)],
            "--weights": ["apply", test, "--lm", m, "--weights", str(locked), "-o", o],
            "model": ["lm", "perplexity", str(locked), str(DEMO / "dev.txt")],
            "lm build text": ["lm", "build", str(locked), "-o", o]}[where]
    done = _cli(args, preexec=_without_file_override)
    if done.returncode == 77:
        pytest.skip("cannot drop CAP_DAC_OVERRIDE here")
    assert done.returncode == 1, done.stderr
    assert done.stderr == f"error: {locked}: permission denied\n"
