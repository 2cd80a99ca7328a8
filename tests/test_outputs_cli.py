"""What a command may do to the paths it writes, through the command line: special files
are written to, never replaced; the outputs of one command are checked before the work and
appear as a set; overflowing scores, markup in names and hostile records are refused or
shown as they are.

Expected behaviour is the project's contract (README "Guarantees" and "Reliability"):
``error: PATH[:LINE][: FIELD]: what is wrong``, exit 1, and no output written.
"""

from __future__ import annotations

import json
import os
import signal
import stat
import subprocess
import sys
import time
from collections.abc import Iterator
from pathlib import Path

import pytest

from rescore.leftovers import TMP_PREFIX
from tests.conftest import FIXTURES, ROOT, run

DEMO = FIXTURES / "demo"


def _cli(args: list[str | os.PathLike[str]], **kw: object) -> subprocess.CompletedProcess[str]:
    return subprocess.run([sys.executable, "-m", "rescore", "-q", *map(str, args)],
                          capture_output=True, text=True, timeout=300, cwd=ROOT,
                          env={**os.environ, "PYTHONPATH": str(ROOT)}, **kw)  # type: ignore[call-overload]


@pytest.fixture(scope="module")
def model(tmp_path_factory: pytest.TempPathFactory) -> dict[str, Path]:
    folder = tmp_path_factory.mktemp("model")
    lm = folder / "logbook.lm"
    assert run(["lm", "build", DEMO / "train.txt", "--order", "3", "-o", lm]).exit_code == 0
    weights = folder / "w.json"
    weights.write_text('{"acoustic_scale": 1.0, "lm_weight": 5.0, "insertion_penalty": 0.0, '
                       '"features": {}}')
    return {"lm": lm, "weights": weights}


def _apply(model: dict[str, Path], out: Path | str, *extra: str | Path
           ) -> subprocess.CompletedProcess[str]:
    return _cli(["apply", DEMO / "test.jsonl", "--lm", model["lm"], "--weights",
                 model["weights"], "-o", out, *extra])


# --- 1: special files ------------------------------------------------------------------

@pytest.mark.skipif(os.geteuid() != 0, reason="making a device node (os.mknod) needs root")
@pytest.mark.parametrize("workers", ["1", "2"])
def test_device_node_named_as_output_is_written_to_not_replaced(
        model: dict[str, Path], tmp_path: Path, workers: str) -> None:
    node = tmp_path / "null"
    os.mknod(node, 0o666 | stat.S_IFCHR, os.makedev(1, 3))  # 1,3 is /dev/null on Linux
    link = tmp_path / "link-to-null"
    link.symlink_to(node)
    for target in (node, link):
        res = _apply(model, target, "--workers", workers, "--shard-mb", "0.01")
        assert res.returncode == 0, res.stderr
        assert stat.S_ISCHR(node.stat().st_mode)  # still the device, not a regular file
        assert link.is_symlink()
    assert sorted(p.name for p in tmp_path.iterdir()) == ["link-to-null", "null"]


def test_fifo_named_as_output_is_streamed_to_its_reader(
        model: dict[str, Path], tmp_path: Path) -> None:
    fifo = tmp_path / "pipe"
    os.mkfifo(fifo)
    proc = subprocess.Popen([sys.executable, "-m", "rescore", "-q", "apply",
                             str(DEMO / "test.jsonl"), "--lm", str(model["lm"]),
                             "--weights", str(model["weights"]), "-o", str(fifo)],
                            cwd=ROOT, env={**os.environ, "PYTHONPATH": str(ROOT)},
                            stderr=subprocess.PIPE)
    with open(fifo, "rb") as reader:
        data = reader.read()
    _, err = proc.communicate(timeout=300)
    assert proc.returncode == 0, err
    assert stat.S_ISFIFO(fifo.stat().st_mode)
    # the demo test set holds 500 utterances (fixtures/demo/README.md), one line each
    assert data.count(b"\n") == 500


def test_dash_and_a_link_to_proc_self_fd_1_write_to_standard_output(
        model: dict[str, Path], tmp_path: Path) -> None:
    through_dash = _apply(model, "-")
    link = tmp_path / "out"
    link.symlink_to("/proc/self/fd/1")
    through_link = _apply(model, link)
    in_file = _apply(model, tmp_path / "file.jsonl")
    assert through_dash.returncode == through_link.returncode == in_file.returncode == 0
    assert through_dash.stdout == through_link.stdout == \
        (tmp_path / "file.jsonl").read_text()
    assert link.is_symlink()


def test_a_descriptor_link_with_stdout_redirected_to_a_file_is_written_through(
        model: dict[str, Path], tmp_path: Path) -> None:
    # standard output redirected to a regular file makes /proc/self/fd/1 look like a regular
    # file: a temporary renamed over the name would replace the link itself (and the shell's
    # file would stay empty). The records go through it, and apply prints no table into it
    link = tmp_path / "stdout-link"
    link.symlink_to("/proc/self/fd/1")
    caught = tmp_path / "caught.jsonl"
    with open(caught, "w") as fh:
        res = subprocess.run(
            [sys.executable, "-m", "rescore", "-q", "apply", str(DEMO / "test.jsonl"), "--lm",
             str(model["lm"]), "--weights", str(model["weights"]), "-o", str(link)],
            stdout=fh, stderr=subprocess.PIPE, text=True, timeout=300, cwd=ROOT,
            env={**os.environ, "PYTHONPATH": str(ROOT)})
    assert res.returncode == 0, res.stderr
    assert link.is_symlink() and os.readlink(link) == "/proc/self/fd/1"
    in_file = tmp_path / "file.jsonl"
    assert _apply(model, in_file).returncode == 0
    assert caught.read_text() == in_file.read_text()


# --- 2: the outputs of one command are checked before the work --------------------------

@pytest.fixture
def unwritable_folder(tmp_path: Path) -> Iterator[Path]:
    """A folder this process cannot write in: mode 0500, or for root (whom modes do not
    stop) a read-only tmpfs (access(2) then fails with EROFS for every user)."""
    folder = tmp_path / "locked"
    folder.mkdir()
    if os.geteuid() != 0:
        folder.chmod(0o500)
        yield folder
        folder.chmod(0o700)
        return
    mounted = subprocess.run(["mount", "-t", "tmpfs", "-o", "ro,size=64k", "tmpfs",
                              str(folder)], capture_output=True, text=True)
    if mounted.returncode != 0:
        pytest.skip(f"mount -t tmpfs not permitted here: {mounted.stderr.strip()}")
    try:
        yield folder
    finally:
        subprocess.run(["umount", str(folder)], check=False)


def test_unwritable_analysis_folder_is_refused_before_tuning(
        model: dict[str, Path], tmp_path: Path, unwritable_folder: Path) -> None:
    weights = tmp_path / "w.json"
    weights.write_text("previous\n")
    res = _cli(["tune", DEMO / "dev.jsonl", "--lm", model["lm"], "-o", weights,
                "--analysis", unwritable_folder / "a.json", "--grid-lm", "0:10:3",
                "--grid-penalty", "0:1:2", "--folds", "0"])
    assert res.returncode == 1
    assert res.stderr.strip().splitlines()[-1] == \
        f"error: {unwritable_folder}: output folder is not writable"
    assert weights.read_text() == "previous\n"  # the weights of the set stay as they were


# --- 3: overflow -------------------------------------------------------------------------

def _weights(folder: Path, **values: object) -> Path:
    path = folder / "weights.json"
    path.write_text(json.dumps({"acoustic_scale": 1.0, "lm_weight": 1.0,
                                "insertion_penalty": 0.0, "features": {}} | values))
    return path


def _with_feature(folder: Path, value: float) -> Path:
    path = folder / "dev-feature.jsonl"
    with open(DEMO / "dev.jsonl") as src, open(path, "w") as dst:
        for line in src:
            record = json.loads(line)
            for hyp in record["hypotheses"]:
                hyp["features"] = {"first_pass_lm": value}
            dst.write(json.dumps(record) + "\n")
    return path


# float64's largest value is about 1.797e308 (IEEE 754 binary64): each product below passes
# it. The first demo test hypothesis has acoustic -262.03 and LM score about -33.9 under the
# trigram (read from a run of this model, not from the file), so 1e308 * -33.9 and
# 1e307 * -262.03 both overflow; 2 * -1.7e308 = -3.4e308 overflows too.
@pytest.mark.parametrize(("weights", "named"), [
    ({"lm_weight": 1e308}, "lm_weight 1e+308 times lm"),
    ({"acoustic_scale": 1e307}, "acoustic_scale 1e+307 times acoustic -262.03"),
])
@pytest.mark.parametrize("workers", ["1", "2"])
def test_total_that_overflows_is_an_error_naming_utterance_and_weight(
        model: dict[str, Path], tmp_path: Path, weights: dict[str, float], named: str,
        workers: str) -> None:
    out = tmp_path / "out.jsonl"
    w = _weights(tmp_path, **weights)
    res = _cli(["apply", DEMO / "test.jsonl", "--lm", model["lm"], "--weights", w, "-o", out,
                "--workers", workers, "--shard-mb", "0.01"])
    assert res.returncode == 1
    last = res.stderr.strip().splitlines()[-1]
    assert last.startswith(f"error: {DEMO / 'test.jsonl'}:1: hypotheses[0].total: "
                           "utterance 'lark-test-0001': total is not finite: ")
    assert named in last and "Traceback" not in res.stderr
    assert sorted(tmp_path.iterdir()) == [w]  # nothing written, no temporary


def test_feature_weight_overflow_and_tuning_on_huge_feature_values_are_clean_errors(
        model: dict[str, Path], tmp_path: Path) -> None:
    dev = _with_feature(tmp_path, -1.7e308)
    w = _weights(tmp_path, features={"first_pass_lm": 2.0})
    res = _cli(["apply", dev, "--lm", model["lm"], "--weights", w, "-o", tmp_path / "o.jsonl"])
    assert res.returncode == 1
    assert "features.first_pass_lm 2 times first_pass_lm -1.7e+308 overflows" in res.stderr
    res = _cli(["tune", dev, "--lm", model["lm"], "--feature", "first_pass_lm",
                "-o", tmp_path / "tuned.json"])
    assert res.returncode == 1, res.stderr
    assert res.stderr.strip().splitlines()[-1] == (
        f"error: {dev}: features.first_pass_lm: utterance 'lark-dev-0001': hypothesis 0: "
        "-1.7e+308 is beyond ±1e+300, too large to weight without overflow; rescale the "
        "feature")
    assert not (tmp_path / "tuned.json").exists() and not (tmp_path / "o.jsonl").exists()


# --- 4: names are never terminal markup --------------------------------------------------

def _on_a_terminal(args: list[str | Path]) -> tuple[int, str]:
    """Run the command with stdout and stderr on a pseudo-terminal (progress bars drawn)."""
    import pty

    master, slave = pty.openpty()
    proc = subprocess.Popen([sys.executable, "-m", "rescore", *map(str, args)], cwd=ROOT,
                            env={**os.environ, "PYTHONPATH": str(ROOT), "COLUMNS": "200"},
                            stdout=slave, stderr=slave, stdin=subprocess.DEVNULL)
    os.close(slave)
    chunks = []
    while True:
        try:
            chunk = os.read(master, 1 << 16)
        except OSError:  # EIO: the other side closed
            break
        if not chunk:
            break
        chunks.append(chunk)
    os.close(master)
    return proc.wait(timeout=300), b"".join(chunks).decode("utf-8", "replace")


def test_paths_with_markup_brackets_are_printed_as_they_are(
        model: dict[str, Path], tmp_path: Path) -> None:
    # rich reads '[v2]' as a style tag (dropped) and '[/]' as a closing tag (MarkupError)
    source = tmp_path / "run[v2].jsonl"
    source.write_bytes((DEMO / "test.jsonl").read_bytes())
    (tmp_path / "x[").mkdir()
    out = tmp_path / "x[" / "]y.jsonl"
    weights = tmp_path / "x[" / "]w.json"
    checked = _cli(["check", source])
    assert checked.returncode == 0 and str(source) in checked.stdout
    for args, shown in [
        (["apply", source, "--lm", model["lm"], "--weights", model["weights"], "-o", out], out),
        (["tune", source, "--lm", model["lm"], "-o", weights, "--folds", "0",
          "--grid-lm", "0:10:3", "--grid-penalty", "0:1:2", "--no-widen"], weights),
        (["lm", "build", DEMO / "train.txt", "-o", tmp_path / "x[" / "]m.lm"],
         tmp_path / "x[" / "]m.lm"),
    ]:
        code, text = _on_a_terminal(args)
        assert code == 0, text
        assert "internal error" not in text and str(shown) in text


# --- 6: the Markdown report stays text ---------------------------------------------------

PAYLOADS = ["[click here](https://evil.example/login)", "![px](https://evil.example/p.png)",
            "_em_ and ~~x~~ and **b**", "<img src=x onerror=alert(1)>", "a\rb | c"]


def _report_pair(folder: Path, ids: list[str], meta_key: str, text: str = "") -> list[Path]:
    """Before and after N-best files of one utterance per id: the first hypothesis is wrong
    (one substitution), the second right, so every id is an 'improved' utterance. Hypothesis
    texts carry ``text`` too (it is not a word of the reference)."""
    files = []
    for name, best in (("before", 0), ("after", 1)):
        path = folder / f"{name}.jsonl"
        with open(path, "w", encoding="utf-8") as fh:
            for i, uid in enumerate(ids):
                fh.write(json.dumps({
                    "id": uid, "reference": "vent bay three",
                    "hypotheses": [{"text": f"went bay three {text}", "acoustic": -1.0},
                                   {"text": "vent bay three", "acoustic": -2.0}],
                    "best": best, "meta": {meta_key: f"group {i % 2} {text}"}}) + "\n")
        files.append(path)
    return files


def _tokens(markdown: str) -> list[tuple[str, str]]:
    from markdown_it import MarkdownIt

    md = MarkdownIt("commonmark").enable(["table", "strikethrough"])

    def walk(tokens: list[object]) -> list[tuple[str, str]]:
        out: list[tuple[str, str]] = []
        for tok in tokens:
            out.append((tok.type, tok.content))  # type: ignore[attr-defined]
            out += walk(tok.children or [])  # type: ignore[attr-defined]
        return out

    return walk(md.parse(markdown))


MARKUP = {"link_open", "image", "em_open", "strong_open", "s_open", "html_inline",
          "html_block", "code_inline", "tr_open", "heading_open", "autolink_open"}


def test_markdown_report_lets_no_data_take_effect(tmp_path: Path) -> None:
    plain_dir, hostile_dir = tmp_path / "plain", tmp_path / "hostile"
    plain_dir.mkdir()
    hostile_dir.mkdir()
    plain = _report_pair(plain_dir, [f"utt-{i}" for i in range(len(PAYLOADS))], "speaker",
                         text="boom")
    hostile = _report_pair(hostile_dir, PAYLOADS, "spk\r[x](https://evil.example)",
                           text="*boom*")
    shapes = []
    for (before, after), out in ((plain, tmp_path / "rep-plain"),
                                 (hostile, tmp_path / "rep-hostile")):
        res = run(["report", "--before", before, "--after", after, "-o", out,
                   "--resamples", "50"])
        assert res.exit_code == 0, res.output
        tokens = _tokens((out / "report.md").read_text(encoding="utf-8"))
        shapes.append(sorted(t for t, _ in tokens if t in MARKUP))
        text = "".join(c for t, c in tokens if t == "text")
    # the same links, images, emphasis, HTML, rows and headings as with plain ids: all
    # from the report's own layout, none from the data
    assert shapes[0] == shapes[1]
    assert not {"link_open", "image", "html_inline", "html_block"} & set(shapes[1])
    for payload in PAYLOADS:  # each shown as its text, a carriage return read as a space
        assert payload.replace("\r", " ") in text


# --- 9: smaller refusals -------------------------------------------------------------------

@pytest.mark.parametrize(("line", "key"), [
    ('{"id": "a", "hypotheses": [{"text": "x", "acoustic": -1, "acoustic": -2}]}', "acoustic"),
    ('{"id": "a", "id": "b", "hypotheses": [{"text": "x", "acoustic": -1}]}', "id"),
    ('{"id": "a", "hypotheses": [{"text": "x \\": y", "acoustic": -1}], '
     '"meta": {"k": {"s" : 1, "s": 2}}}', "s"),
])
def test_duplicate_key_in_a_record_is_refused(tmp_path: Path, line: str, key: str) -> None:
    # RFC 8259 section 4: names "SHOULD be unique"; parsers differ on which of two wins
    path = tmp_path / "dup.jsonl"
    path.write_text(line + "\n")
    res = _cli(["check", path])
    assert res.returncode == 1
    assert res.stderr.strip() == (f"error: {path}:1: {key}: key {key!r} appears twice in one "
                                  "object (which one counts would be a guess)")


def test_key_like_text_inside_values_is_not_a_duplicate(tmp_path: Path) -> None:
    path = tmp_path / "ok.jsonl"
    path.write_text(json.dumps({"id": "a", "reference": 'x "id": y', "hypotheses": [
        {"text": 'x \\": "acoustic": y', "acoustic": -1.0}], "meta": {"id": "z"}}) + "\n")
    res = _cli(["check", path])
    assert res.returncode == 0, res.stderr


def test_duplicate_key_in_a_weights_file_is_refused(model: dict[str, Path], tmp_path: Path
                                                    ) -> None:
    weights = tmp_path / "w.json"
    weights.write_text('{"acoustic_scale": 1.0, "lm_weight": 5.0, "lm_weight": 0.0, '
                       '"insertion_penalty": 0.0, "features": {}}')
    res = _apply(model, tmp_path / "o.jsonl", "--weights", weights)
    assert res.returncode == 1
    assert res.stderr.strip().endswith(f"error: {weights}: lm_weight: key 'lm_weight' appears "
                                       "twice in one object (which one counts would be a guess)")


def test_report_tuning_that_is_not_a_tuning_record_is_refused(tmp_path: Path) -> None:
    tuning = tmp_path / "t.json"
    tuning.write_text('{"hello": 1}')
    res = _cli(["report", "--before", DEMO / "test.jsonl", "--after", DEMO / "test.jsonl",
                "--tuning", tuning, "-o", tmp_path / "rep", "--resamples", "20"])
    assert res.returncode == 1
    assert res.stderr.strip().endswith(
        f"error: {tuning}: not a tuning record: it has neither 'surface' nor 'depth' (write "
        "one with 'rescore tune --analysis FILE')")
    assert not (tmp_path / "rep").exists()


def test_an_output_that_is_one_of_the_inputs_is_refused(model: dict[str, Path],
                                                        tmp_path: Path) -> None:
    source = tmp_path / "in.jsonl"
    source.write_bytes((DEMO / "test.jsonl").read_bytes())
    alias = tmp_path / "alias.jsonl"
    alias.symlink_to(source)
    lm_copy = tmp_path / "m.lm"
    lm_copy.write_bytes(model["lm"].read_bytes())
    before = source.read_bytes(), lm_copy.read_bytes()
    (tmp_path / "rep").mkdir()
    (tmp_path / "rep" / "report.json").symlink_to(source)
    cases = [
        (["apply", source, "--lm", lm_copy, "--weights", model["weights"], "-o", alias], alias),
        (["apply", source, "--lm", lm_copy, "--weights", model["weights"], "-o", lm_copy],
         lm_copy),
        (["tune", source, "--lm", lm_copy, "-o", lm_copy], lm_copy),
        (["lm", "build", source, "-o", source], source),
        (["report", "--before", source, "--after", source, "-o", tmp_path / "rep",
          "--resamples", "20"], tmp_path / "rep" / "report.json"),
    ]
    for args, named in cases:
        res = _cli(args)
        assert res.returncode == 2, (args, res.stderr)
        assert res.stderr.strip() == \
            f"error: {named}: the output is one of the inputs; name another file"
    assert (source.read_bytes(), lm_copy.read_bytes()) == before


def test_report_folder_with_two_links_to_one_file_says_why(tmp_path: Path) -> None:
    folder = tmp_path / "rep"
    folder.mkdir()
    (folder / "real").write_text("")
    (folder / "report.md").symlink_to("real")
    (folder / "report.html").symlink_to("real")
    res = _cli(["report", "--before", DEMO / "test.jsonl", "--after", DEMO / "test.jsonl",
                "-o", folder, "--resamples", "20"])
    assert res.returncode == 2
    assert res.stderr.strip().splitlines()[-1] == (
        f"error: {folder / 'report.md'} and {folder / 'report.html'} are one file (through "
        f"links, both are {(folder / 'real').resolve()}): each output of a command must be "
        "a file of its own")


# --- 5: a second run in another PID namespace leaves a live run's scratch alone -----------

def test_run_in_another_pid_namespace_keeps_a_live_runs_shards(tmp_path: Path) -> None:
    """The second run sees no process of the first run's pid (a fresh PID namespace, as in
    another container sharing the folder), so only the first run's flock keeps its
    temporary and shard folder from being taken for a dead run's leftovers."""
    from tests.bulk import write_bulk, write_weights

    probe = subprocess.run(["unshare", "--pid", "--fork", "true"], capture_output=True,
                           text=True)
    if probe.returncode != 0:
        pytest.skip(f"unshare --pid not permitted here: {probe.stderr.strip()}")
    big, weights = tmp_path / "big.jsonl", tmp_path / "w.json"
    write_bulk(big, 40_000, depth=10)
    write_weights(weights)
    out_dir = tmp_path / "out"
    out_dir.mkdir()
    out = out_dir / "o.jsonl"
    env = {**os.environ, "PYTHONPATH": str(ROOT)}
    first = subprocess.Popen([sys.executable, "-m", "rescore", "-q", "apply", str(big),
                              "--weights", str(weights), "-o", str(out), "--workers", "2",
                              "--shard-mb", "4"], cwd=ROOT, env=env,
                             stdout=subprocess.DEVNULL, stderr=subprocess.PIPE, text=True)
    deadline = time.monotonic() + 120
    while not any(p.name.startswith(TMP_PREFIX) for p in out_dir.iterdir()):
        assert first.poll() is None and time.monotonic() < deadline, "first run ended early"
        time.sleep(0.05)
    second = subprocess.run(["unshare", "--pid", "--fork", sys.executable, "-m", "rescore",
                             "-q", "apply", str(DEMO / "test.jsonl"), "--weights",
                             str(weights), "-o", str(out)], cwd=ROOT, env=env,
                            capture_output=True, text=True, timeout=300)
    assert second.returncode == 0, second.stderr
    assert first.poll() is None, "the first run ended before the second: enlarge the input"
    _, err = first.communicate(timeout=600)
    assert first.returncode == 0, err
    assert out.read_bytes().count(b"\n") == 40_000  # the first run's output, whole
    assert [p.name for p in out_dir.iterdir()] == ["o.jsonl"]


# --- 7: a batch is bounded by bytes as well as by records ---------------------------------

def _peak_rss_mb(args: list[str | Path]) -> float:
    """Peak resident memory of one command in its own process (ru_maxrss is in KiB on
    Linux, getrusage(2))."""
    code = ("import resource, subprocess, sys; "
            "r = subprocess.run(sys.argv[1:]); "
            "print(resource.getrusage(resource.RUSAGE_CHILDREN).ru_maxrss / 1024); "
            "sys.exit(r.returncode)")
    res = subprocess.run([sys.executable, "-c", code, sys.executable, "-m", "rescore", "-q",
                          *map(str, args)], capture_output=True, text=True, cwd=ROOT,
                         env={**os.environ, "PYTHONPATH": str(ROOT)}, timeout=600)
    assert res.returncode == 0, res.stderr
    return float(res.stdout.strip().splitlines()[-1])


def test_few_huge_lines_take_no_more_memory_than_batches_of_one(tmp_path: Path) -> None:
    # 4 lines of about 9.5 MB each (8,000 hypotheses of 200 words), each over the batch's
    # 8 MiB byte bound (so a batch holds one) and under every per-line cap; a default batch
    # of 2,000 records would hold all 4 at once
    path = tmp_path / "long.jsonl"
    words = ["vent", "bay", "three", "opened", "to", "forty", "percent", "lamp", "bank",
             "four", "dimmed"]
    text = " ".join(words[i % len(words)] for i in range(200))
    with open(path, "w") as fh:
        for u in range(4):
            fh.write(json.dumps({"id": f"u{u}", "hypotheses": [
                {"text": text, "acoustic": -100.0 - j} for j in range(8000)]}) + "\n")
    weights = _weights(tmp_path, lm_weight=0.0)
    for command in (["check", path], ["apply", path, "--weights", weights,
                                      "-o", tmp_path / "o.jsonl"]):
        default = _peak_rss_mb(command)
        one = _peak_rss_mb([*command, "--batch-size", "1"])
        # the baseline is the same command with batches of one record, measured in this
        # run; 1.5 leaves room for allocator noise, while the 4 lines at once measured
        # about 3 times as much before batches were bounded by bytes (README "Large jobs")
        assert default < 1.5 * one, (command[0], default, one)


# --- 8: a signal stops the workers at once -------------------------------------------------

@pytest.fixture(scope="module")
def bulk(tmp_path_factory: pytest.TempPathFactory) -> tuple[Path, Path]:
    from tests.bulk import write_bulk, write_weights

    folder = tmp_path_factory.mktemp("bulk")
    write_bulk(folder / "big.jsonl", 40_000, depth=10)  # about 56 MB
    write_weights(folder / "w.json")
    return folder / "big.jsonl", folder / "w.json"


def _apply_workers(bulk: tuple[Path, Path], out: Path) -> list[str]:
    # shards of 28 MiB: two, one per worker, each a few seconds of work
    return [sys.executable, "-m", "rescore", "-q", "apply", str(bulk[0]), "--weights",
            str(bulk[1]), "-o", str(out), "--workers", "2", "--shard-mb", "28"]


@pytest.mark.parametrize("sig", [signal.SIGTERM, signal.SIGINT], ids=["SIGTERM", "SIGINT"])
def test_signal_to_apply_with_workers_stops_them_at_once(
        bulk: tuple[Path, Path], tmp_path: Path, sig: signal.Signals) -> None:
    import psutil

    env = {**os.environ, "PYTHONPATH": str(ROOT)}
    started = time.monotonic()
    subprocess.run(_apply_workers(bulk, tmp_path / "whole.jsonl"), env=env, cwd=ROOT,
                   check=True, capture_output=True, timeout=600)
    whole_run = time.monotonic() - started  # the baseline, measured in this run
    folder = tmp_path / "out"
    folder.mkdir()
    proc = subprocess.Popen(_apply_workers(bulk, folder / "o.jsonl"), env=env, cwd=ROOT,
                            stdout=subprocess.DEVNULL, stderr=subprocess.PIPE, text=True)
    deadline = time.monotonic() + 120
    while len(psutil.Process(proc.pid).children()) < 2 or not any(folder.iterdir()):
        assert proc.poll() is None and time.monotonic() < deadline, "run ended early"
        time.sleep(0.05)
    time.sleep(0.3)  # the workers are inside their shards
    workers = psutil.Process(proc.pid).children(recursive=True)
    signalled = time.monotonic()
    proc.send_signal(sig)
    _, err = proc.communicate(timeout=120)
    stopped = time.monotonic() - signalled
    # the shell's convention for death by signal n is 128 + n (bash manual, "EXIT STATUS")
    assert proc.returncode == 128 + sig, err
    assert err.strip().splitlines()[-1].startswith("error: ")
    assert not [w for w in workers if w.is_running() and w.status() != psutil.STATUS_ZOMBIE]
    assert list(folder.iterdir()) == []  # no output, no temporary, no shard folder
    # stopping waits for no shard: well under the time of the run (measured here: 0.2 s
    # against 3.1 s while a shard was running, before workers were terminated)
    assert stopped < 0.5 * whole_run, (stopped, whole_run)
