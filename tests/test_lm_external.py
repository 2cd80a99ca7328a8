"""Counting within a memory budget (sorted runs on disk) and on a Dask cluster: the same
counts as a plain Counter, the same model file byte for byte as an in-memory build, nothing
left in the scratch folder, one-line errors."""

from __future__ import annotations

import contextlib
import hashlib
import os
import signal
import subprocess
import sys
import time
from collections import Counter
from pathlib import Path

import numpy as np
import pytest
from hypothesis import given
from hypothesis import strategies as st
from typer.testing import CliRunner

from rescore.cli import app
from rescore.errors import InputError, UsageError
from rescore.leftovers import TMP_PREFIX
from rescore.lm import NGramModel, external, read_corpus, save_model
from rescore.lm.counts import OrderCounts
from rescore.lm.external import (
    count_external,
    merge_runs,
    parse_size,
    write_run,
)
from rescore.lm.keys import KeyCodec
from rescore.lm.vocab import Vocabulary
from tests.conftest import full_disk_for

TINY = 64 << 10  # the least budget: chunks of 256 tokens, so a 20,000-word text makes ~90 runs


def _zipf_sentences(n_words: int, vocab: int, seed: int) -> list[list[str]]:
    rng = np.random.default_rng(seed)
    p = 1.0 / np.arange(1, vocab + 1) ** 1.1
    ranks = rng.choice(vocab, size=n_words, p=p / p.sum())
    cuts = np.cumsum(rng.integers(1, 15, size=n_words))
    cuts = cuts[cuts < n_words]
    return [[f"w{r}" for r in part] for part in np.split(ranks, cuts) if len(part)]


SENTS = _zipf_sentences(20_000, 2_000, 7)


def _file_bytes(model: NGramModel, folder: Path, name: str) -> bytes:
    path = folder / name
    save_model(model, path)
    return path.read_bytes()


def _words_of(tables: list[OrderCounts], vocab: Vocabulary) -> list[Counter[tuple[str, ...]]]:
    """Each order's table as a Counter of word tuples (w1 .. wk), decoded the slow way."""
    grams: list[list[tuple[str, ...]]] = [[(w,) for w in vocab.words]]
    out: list[Counter[tuple[str, ...]]] = [
        Counter({g: int(c) for g, c in zip(grams[0], tables[0].count, strict=True) if c})]
    for k in range(2, len(tables) + 1):
        t = tables[k - 1]
        grams.append([(vocab.words[f], *grams[k - 2][s])
                      for s, f in zip(t.suffix.tolist(), t.first.tolist(), strict=True)])
        out.append(Counter(dict(zip(grams[k - 1], t.count.tolist(), strict=True))))
    return out


def test_counts_equal_a_plain_counter_over_many_runs() -> None:
    # the obviously-correct version: every window of <s> w1 .. wn </s>, up to the order
    order = 3
    counted = count_external(SENTS, order, lambda w, c: Vocabulary.from_words(w[3:]),
                             closed_vocab=False, memory=TINY)
    assert counted.runs > 10
    expected: list[Counter[tuple[str, ...]]] = [Counter() for _ in range(order)]
    for s in SENTS:
        padded = ["<s>", *s, "</s>"]
        for i in range(len(padded)):
            for n in range(1, min(order, i + 1) + 1):
                expected[n - 1][tuple(padded[i - n + 1:i + 1])] += 1
    assert _words_of(counted.tables, counted.vocab) == expected
    assert (counted.sentences, counted.words, counted.oov) == (
        len(SENTS), sum(len(s) for s in SENTS), 0)


def test_hand_worked_two_sentences() -> None:
    # hand-worked: "a b" and "b a" padded: <s> a b </s>, <s> b a </s>. Bigrams (w1, w2), one each:
    # (<s>,a) (a,b) (b,</s>) (<s>,b) (b,a) (a,</s>); unigram a: 2, b: 2, <s>: 2, </s>: 2
    counted = count_external([["a", "b"], ["b", "a"]], 2,
                             lambda w, c: Vocabulary.from_words(["a", "b"]),
                             closed_vocab=False, memory=TINY)
    uni, bi = _words_of(counted.tables, counted.vocab)
    assert uni == Counter({("<s>",): 2, ("</s>",): 2, ("a",): 2, ("b",): 2})
    assert bi == Counter({g: 1 for g in [("<s>", "a"), ("a", "b"), ("b", "</s>"),
                                          ("<s>", "b"), ("b", "a"), ("a", "</s>")]})


@pytest.mark.parametrize(("order", "method", "extra"), [
    (4, "mkn", {}),
    (3, "wb", {"closed_vocab": True, "max_vocab": 300}),
    (2, "kn", {"min_count": 2, "cutoffs": [2]}),
    (1, "addk", {}),
    # 6 orders of 11-bit ids do not fit in 64 bits: the byte-string keys
    (6, "abs", {"prune": 1e-6}),
])
def test_model_byte_identical_to_in_memory_build(tmp_path: Path, order: int, method: str,
                                                 extra: dict[str, object]) -> None:
    plain = NGramModel(order, method, **extra).fit(SENTS)  # type: ignore[arg-type]
    runs = NGramModel(order, method, **extra).fit(SENTS, memory=TINY,  # type: ignore[arg-type]
                                                  scratch=tmp_path)
    one = NGramModel(order, method, **extra).fit(SENTS, memory=1 << 30)  # type: ignore[arg-type]
    reference = _file_bytes(plain, tmp_path, "plain.lm")
    assert _file_bytes(runs, tmp_path, "runs.lm") == reference
    assert _file_bytes(one, tmp_path, "one.lm") == reference
    assert [p.name for p in tmp_path.iterdir() if p.name.startswith(TMP_PREFIX)] == []


def test_literal_reserved_words_and_unknown_words_as_in_memory(tmp_path: Path) -> None:
    sents = [*SENTS[:500], ["<s>", "x", "</s>", "<unk>"], *SENTS[500:1500]]
    for closed in (False, True):
        a = NGramModel(3, closed_vocab=closed, max_vocab=50).fit(sents)
        b = NGramModel(3, closed_vocab=closed, max_vocab=50).fit(sents, memory=TINY)
        assert _file_bytes(a, tmp_path, "a.lm") == _file_bytes(b, tmp_path, "b.lm")
        assert b.metadata_["training_oov"] == a.metadata_["training_oov"] > 0


@given(st.lists(st.lists(st.tuples(st.integers(0, 40), st.integers(1, 5)), max_size=30),
                min_size=1, max_size=6), st.integers(1, 7))
def test_merge_of_runs_sums_like_a_counter(runs: list[list[tuple[int, int]]],
                                           block: int) -> None:
    folder = Path(os.environ.get("TMPDIR", "/tmp"))
    with external.scratch_folder(folder, "test-merge") as scratch:
        written, expected = [], Counter[int]()
        for i, pairs in enumerate(runs):
            run = Counter[int]()
            for key, count in pairs:
                run[key] += count
            expected.update(run)
            keys = np.array(sorted(run), dtype=np.uint64)
            written.append(write_run(scratch, f"r{i}", keys,
                                     np.array([run[int(k)] for k in keys], dtype=np.int64)))
        keys, counts = merge_runs(written, block)
    assert keys.tolist() == sorted(expected)
    assert dict(zip(keys.tolist(), counts.tolist(), strict=True)) == dict(expected)


def test_byte_keys_sort_as_reversed_lexicographic_order() -> None:
    # numpy compares fixed-width bytes byte by byte, so big-endian ids, last word first,
    # order the rows by last word, then the one before, ... (as np.lexsort with the first
    # word as the least significant key)
    codec = KeyCodec(order=6, vocab_size=70_000)
    assert not codec.packed
    words = np.random.default_rng(3).integers(0, 3, size=(500, 4)).astype(np.int32)
    words[:5] = [[0, 0, 0, 256], [256, 0, 0, 0], [1, 0, 0, 0], [0, 0, 0, 1], [0, 1, 0, 0]]
    by_keys = np.argsort(codec.from_words(words), kind="stable")
    by_lexsort = np.lexsort(words.T)
    assert (words[by_keys] == words[by_lexsort]).all()


@pytest.mark.parametrize(("text", "size"), [
    ("4G", 4 << 30), ("500M", 500 << 20), ("1.5g", 3 << 29), ("2GiB", 2 << 30),
    ("64k", 64 << 10), ("123", 123), (" 8 MB ", 8 << 20),
])
def test_memory_sizes_are_powers_of_1024(text: str, size: int) -> None:
    assert parse_size(text) == size


@pytest.mark.parametrize("text", ["", "G", "4x", "-1G", "4 G B", "1e9"])
def test_bad_memory_sizes(text: str) -> None:
    with pytest.raises(UsageError):
        parse_size(text)


def test_default_memory_is_half_of_what_is_available() -> None:
    avail = external.available_memory()
    if avail is None:
        pytest.skip("no /proc/meminfo here")
    # MemAvailable moves while the test runs (other processes); half of it, within 10 %
    assert abs(external.default_memory() - avail / 2) < 0.1 * avail


# --- the command line -----------------------------------------------------------------------

runner = CliRunner()


@pytest.fixture
def corpus(tmp_path: Path) -> Path:
    path = tmp_path / "corpus.txt"
    path.write_text("".join(" ".join(s) + "\n" for s in SENTS[:3000]))
    return path


def test_cli_memory_and_scratch_same_file(corpus: Path, tmp_path: Path) -> None:
    scratch = tmp_path / "scratch"
    scratch.mkdir()
    outs = []
    for name, extra in [("a.lm", []), ("b.lm", ["--memory", "64K", "--scratch", str(scratch)])]:
        result = runner.invoke(app, ["lm", "build", str(corpus), "-n", "4", "-o",
                                     str(tmp_path / name), *extra])
        assert result.exit_code == 0, result.stderr
        outs.append((tmp_path / name).read_bytes())
    assert outs[0] == outs[1]
    assert list(scratch.iterdir()) == []


@pytest.mark.parametrize(("args", "message"), [
    (["--memory", "lots"], "error: --memory: memory size 'lots' is not a number"),
    (["--memory", "1K"], "error: --memory: at least 64K is needed, got '1K'"),
    (["--workers", "2"], "error: --workers: --workers goes with --cluster local"),
])
def test_cli_bad_options_are_usage_errors(corpus: Path, tmp_path: Path, args: list[str],
                                          message: str) -> None:
    result = runner.invoke(app, ["lm", "build", str(corpus), "-o", str(tmp_path / "m.lm"),
                                 *args])
    assert result.exit_code == 2
    assert result.stderr.startswith(message)
    assert not (tmp_path / "m.lm").exists()


def test_cli_missing_scratch_folder(corpus: Path, tmp_path: Path) -> None:
    result = runner.invoke(app, ["lm", "build", str(corpus), "-o", str(tmp_path / "m.lm"),
                                 "--scratch", str(tmp_path / "nowhere")])
    assert result.exit_code == 1
    assert result.stderr == f"error: {tmp_path / 'nowhere'}: scratch folder not found\n"


def test_full_scratch_disk_is_one_line(corpus: Path, tmp_path: Path,
                                       monkeypatch: pytest.MonkeyPatch) -> None:
    # the runs meet a full disk once the first pass is on disk
    full_disk_for(monkeypatch, external, "run")
    scratch = tmp_path / "scratch"
    scratch.mkdir()
    result = runner.invoke(app, ["lm", "build", str(corpus), "-o", str(tmp_path / "m.lm"),
                                 "--memory", "64K", "--scratch", str(scratch)])
    assert result.exit_code == 1
    assert result.stderr.startswith(f"error: {scratch}: no space left on device")
    assert result.stderr.count("\n") == 1
    assert list(scratch.iterdir()) == []
    assert not (tmp_path / "m.lm").exists()


def test_library_full_disk_names_the_folder(tmp_path: Path,
                                            monkeypatch: pytest.MonkeyPatch) -> None:
    if not os.path.exists("/dev/full"):
        pytest.skip("no /dev/full here")
    monkeypatch.setattr(external, "_create", lambda path: open("/dev/full", "wb"))  # noqa: SIM115
    with pytest.raises(InputError, match="no space left on device") as info:
        NGramModel(3).fit(SENTS, memory=TINY, scratch=tmp_path)
    assert info.value.path == str(tmp_path)
    assert list(tmp_path.iterdir()) == []


def _scratch_names(scratch: Path) -> list[str]:
    """The files in the build's folders under ``scratch`` (which come and go meanwhile)."""
    names = []
    for folder in scratch.iterdir():
        with contextlib.suppress(FileNotFoundError, NotADirectoryError):
            names += [p.name for p in folder.iterdir()]
    return names


@pytest.mark.slow
@pytest.mark.parametrize("sig", [signal.SIGINT, signal.SIGTERM], ids=["SIGINT", "SIGTERM"])
@pytest.mark.parametrize(("stage", "memory"), [("run", "64K"), ("prob", "1G")],
                         ids=["counting", "estimating"])
def test_interrupted_build_leaves_no_scratch_files(tmp_path: Path, sig: signal.Signals,
                                                   stage: str, memory: str) -> None:
    # interrupted while counting (sorted runs on disk) or while estimating (each order's
    # probabilities on disk): the folder goes either way
    text = tmp_path / "big.txt"
    sents = _zipf_sentences(600_000, 20_000, 11)
    text.write_text("".join(" ".join(s) + "\n" for s in sents))
    scratch = tmp_path / "scratch"
    scratch.mkdir()
    out = tmp_path / "m.lm"
    proc = subprocess.Popen([sys.executable, "-m", "rescore", "lm", "build", str(text),
                             "-n", "4", "-o", str(out), "--memory", memory, "--scratch",
                             str(scratch)], stdout=subprocess.PIPE, stderr=subprocess.PIPE)
    deadline = time.monotonic() + 120
    seen = False
    while time.monotonic() < deadline and proc.poll() is None and not seen:
        seen = any(name.startswith(stage) for name in _scratch_names(scratch))
        time.sleep(0.01)
    assert seen, f"the build finished or stalled before writing {stage} files; enlarge the text"
    proc.send_signal(sig)
    _, err = proc.communicate(timeout=60)
    assert proc.returncode == 128 + sig  # the shell convention: 130 for SIGINT, 143 for SIGTERM
    assert err.decode().strip().splitlines()[-1].startswith("error: ")
    assert b"Traceback" not in err
    assert list(scratch.iterdir()) == []
    assert not out.exists()


# --- a Dask cluster ---------------------------------------------------------------------------

def _digest(path: Path) -> str:
    return hashlib.sha256(path.read_bytes()).hexdigest()


@pytest.mark.slow
def test_local_cluster_byte_identical_over_many_shards(tmp_path: Path) -> None:
    pytest.importorskip("distributed")
    texts = [tmp_path / "a.txt", tmp_path / "b.txt"]
    texts[0].write_text("".join(" ".join(s) + "\n" for s in SENTS[:2500]) + "<s> x <unk>\n\n")
    texts[1].write_text("".join(" ".join(s) + "\n" for s in SENTS[2500:]))
    from rescore.lm import sharded

    shards = sharded.plan_shards(texts, 8, min_bytes=10_000)
    assert len(shards) >= 4
    for extra in [{}, {"closed_vocab": True, "max_vocab": 300}]:
        local = NGramModel(4, **extra).fit(read_corpus(texts))  # type: ignore[arg-type]
        dasked = NGramModel(4, **extra).fit_on_cluster(  # type: ignore[arg-type]
            texts, "local", workers=2, memory=TINY, scratch=tmp_path)
        assert _file_bytes(dasked, tmp_path, "d.lm") == _file_bytes(local, tmp_path, "l.lm")
    assert [p.name for p in tmp_path.iterdir() if p.name.startswith(TMP_PREFIX)] == []


@pytest.mark.slow
def test_cluster_through_the_command_line_and_its_errors(corpus: Path, tmp_path: Path) -> None:
    pytest.importorskip("distributed")
    a, b = tmp_path / "a.lm", tmp_path / "b.lm"
    assert runner.invoke(app, ["lm", "build", str(corpus), "-o", str(a)]).exit_code == 0
    result = runner.invoke(app, ["lm", "build", str(corpus), "-o", str(b), "--cluster",
                                 "local", "--workers", "2"])
    assert result.exit_code == 0, result.stderr
    assert _digest(a) == _digest(b)
    bad = tmp_path / "bad.txt"
    bad.write_bytes(b"fine words\nbad \xff byte\n")
    result = runner.invoke(app, ["lm", "build", str(bad), "-o", str(tmp_path / "c.lm"),
                                 "--cluster", "local", "--workers", "1"])
    assert result.exit_code == 1
    assert result.stderr == (f"error: {bad}:2: invalid UTF-8 byte 0xff at byte offset 15\n")
    assert not (tmp_path / "c.lm").exists()


def test_a_killed_build_leaves_a_folder_that_the_next_build_removes(tmp_path: Path) -> None:
    # a folder named for a process that no longer exists (a child that has exited), and
    # one of this live process, which must stay
    child = subprocess.run([sys.executable, "-c", "import os; print(os.getpid())"],
                           capture_output=True, text=True, check=True)
    dead = tmp_path / f"{TMP_PREFIX}lm-counts.{child.stdout.strip()}.abc"
    live = tmp_path / f"{TMP_PREFIX}lm-counts.{os.getpid()}.xyz"
    for folder in (dead, live):
        folder.mkdir()
        (folder / "run00000.2.keys").write_bytes(b"\0" * 8)
    NGramModel(2).fit(SENTS[:100], memory=TINY, scratch=tmp_path)
    assert sorted(p.name for p in tmp_path.iterdir()) == [live.name]
