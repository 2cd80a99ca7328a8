"""Parallel rescoring: worker processes and a real Dask LocalCluster give the same bytes."""

from __future__ import annotations

import json
from pathlib import Path

import numpy as np
import pytest

from rescore import pipeline
from rescore.counting import Counting
from rescore.demo_kana import BUNDLED_KANA
from rescore.errors import InputError
from rescore.lm import NGramModel, read_corpus, save_model
from rescore.lm.corpus import char_sentences
from rescore.weights import Weights

WEIGHTS = Weights(1.0, 0.0, 0.7, {"first_pass_lm": 4.0})
LM_WEIGHTS = Weights(1.0, 9.0, 2.0, {"first_pass_lm": 0.5})
DEMO = Path(__file__).resolve().parent.parent / "fixtures" / "demo"


def _generated_with_edit(path: Path, n: int, seed: int, line: int, old: str, new: str) -> Path:
    """A generated file whose 0-based ``line`` has its first ``old`` replaced by ``new``."""
    _generate(path, n, seed=seed)
    lines = path.read_text().splitlines()
    lines[line] = lines[line].replace(old, new, 1)
    path.write_text("\n".join(lines) + "\n")
    return path


def _generate(path: Path, n: int, seed: int = 7) -> None:
    # invented records of the demo scenario's shape, only to exercise the plumbing
    rng = np.random.default_rng(seed)
    words = ["bay", "day", "row", "grow", "vent", "went", "pump", "lamp", "four", "for"]
    with open(path, "w") as fh:
        for i in range(n):
            hyps = []
            for _ in range(int(rng.integers(1, 21))):
                text = " ".join(rng.choice(words, size=int(rng.integers(0, 16))))
                hyps.append({"text": text, "acoustic": round(float(rng.normal(-300, 20)), 4),
                             "features": {"first_pass_lm": round(float(rng.normal(-40, 5)), 4)}})
            fh.write(json.dumps({"id": f"gen-{i:06d}", "reference": "bay row",
                                 "hypotheses": hyps}) + "\n")


@pytest.fixture(scope="module")
def generated(tmp_path_factory: pytest.TempPathFactory) -> Path:
    path = tmp_path_factory.mktemp("gen") / "gen.jsonl"
    _generate(path, 20_000)
    return path


@pytest.fixture(scope="module")
def demo_lm(tmp_path_factory: pytest.TempPathFactory) -> dict[str, pipeline.NamedModel]:
    """A trigram built from the demo's training text, saved in the native (mapped) format."""
    from rescore.lm import NGramModel, read_corpus, save_model

    path = tmp_path_factory.mktemp("lm") / "train.lm"
    save_model(NGramModel(3, "mkn").fit(read_corpus(DEMO / "train.txt")), path)
    return pipeline.load_lms([str(path)])


def _apply(src: Path, out: Path, **kw: object) -> tuple[bytes, bytes]:
    return _apply_counted(src, out, **kw)[:2]


def _apply_counted(src: Path, out: Path, **kw: object) -> tuple[bytes, bytes, int]:
    tsv = out.with_suffix(".tsv")
    kw.setdefault("models", {})
    kw.setdefault("weights", WEIGHTS)
    result = pipeline.apply_file(src, out, text_path=tsv, **kw)  # type: ignore[arg-type]
    return out.read_bytes(), tsv.read_bytes(), result.shards


def _three_ways(src: Path, folder: Path, **kw: object) -> None:
    """One process, two worker processes and a real two-process Dask LocalCluster give the
    same bytes, the parallel runs over more than one shard."""
    single = _apply_counted(src, folder / "single.jsonl", **kw)
    pooled = _apply_counted(src, folder / "pooled.jsonl", workers=2, **kw)
    dasked = _apply_counted(src, folder / "dask.jsonl", workers=2, cluster="local", **kw)
    assert single[2] == 1 and pooled[2] > 1 and dasked[2] > 1, (pooled[2], dasked[2])
    assert pooled[:2] == single[:2]
    assert dasked[:2] == single[:2]
    leftovers = [p.name for p in folder.iterdir() if p.name.startswith(".rescore-tmp")]
    assert leftovers == []
    # the language model was really applied: every hypothesis carries its log-probability
    first = json.loads(single[0].split(b"\n", 1)[0])
    assert all(h["lm"] < 0 for h in first["hypotheses"])


def test_generated_set_with_an_lm_byte_identical(generated: Path, tmp_path: Path,
                                                 demo_lm: dict[str, pipeline.NamedModel]
                                                 ) -> None:
    _three_ways(generated, tmp_path, models=demo_lm, weights=LM_WEIGHTS, batch_size=500)
    assert (tmp_path / "single.jsonl").read_bytes().count(b"\n") == 20_000


def test_demo_test_set_with_an_lm_in_several_shards_byte_identical(
        tmp_path: Path, demo_lm: dict[str, pipeline.NamedModel]) -> None:
    # the demo file is under the default least shard size: ask for shards of ~100 kB
    assert (DEMO / "test.jsonl").stat().st_size < (1 << 20)
    _three_ways(DEMO / "test.jsonl", tmp_path, models=demo_lm, weights=LM_WEIGHTS,
                shard_bytes=100_000)


def test_default_shard_size_keeps_a_small_file_whole(tmp_path: Path) -> None:
    assert _apply_counted(DEMO / "test.jsonl", tmp_path / "a.jsonl", workers=2)[2] == 1


def test_gzip_input_in_parallel(tmp_path: Path) -> None:
    import gzip

    src = tmp_path / "small.jsonl"
    _generate(src, 300, seed=3)
    packed = tmp_path / "small.jsonl.gz"
    packed.write_bytes(gzip.compress(src.read_bytes()))
    assert _apply(packed, tmp_path / "a.jsonl", workers=2) == _apply(src, tmp_path / "b.jsonl")


def test_duplicate_id_across_shards_is_caught(tmp_path: Path) -> None:
    src = tmp_path / "dup.jsonl"
    _generate(src, 3000, seed=5)
    lines = src.read_text().splitlines()
    lines.append(lines[0])
    src.write_text("\n".join(lines) + "\n")
    out = tmp_path / "out.jsonl"
    with pytest.raises(InputError, match="duplicate id 'gen-000000' \\(first on line 1\\)") as e:
        pipeline.apply_file(src, out, models={}, weights=WEIGHTS, workers=2)
    assert e.value.line == 3001
    assert sorted(p.name for p in tmp_path.iterdir()) == ["dup.jsonl"]


def test_bad_record_in_a_worker_names_the_file_and_line(tmp_path: Path) -> None:
    src = _generated_with_edit(tmp_path / "bad.jsonl", 2000, 9, 1500, '"acoustic"',
                               '"acoustik"')
    with pytest.raises(InputError) as e:
        pipeline.apply_file(src, tmp_path / "out.jsonl", models={}, weights=WEIGHTS, workers=2)
    assert (e.value.path, e.value.line) == (str(src), 1501)
    assert e.value.field is not None and "acoustik" in e.value.field


def test_shard_size_option_on_the_command_line(tmp_path: Path,
                                               demo_lm: dict[str, pipeline.NamedModel]) -> None:
    from tests.conftest import run

    weights = tmp_path / "w.json"
    weights.write_text(json.dumps({"acoustic_scale": 1.0, "lm_weight": 9.0,
                                   "insertion_penalty": 2.0, "features": {}}))
    lm = str(demo_lm["lm"].path)
    base = ["apply", DEMO / "test.jsonl", "--lm", lm, "--weights", weights]
    one = run([*base, "-o", tmp_path / "one.jsonl"])
    two = run([*base, "-o", tmp_path / "two.jsonl", "--workers", "2", "--shard-mb", "0.1"])
    assert one.exit_code == 0 and two.exit_code == 0, two.stderr
    assert "in 8 shards" in two.stderr and "shards" not in one.stderr
    assert (tmp_path / "one.jsonl").read_bytes() == (tmp_path / "two.jsonl").read_bytes()


def test_reference_missing_in_a_later_shard_names_its_line(tmp_path: Path) -> None:
    # the contract: references on all utterances or on none; the first one without is named
    src = _generated_with_edit(tmp_path / "mixed.jsonl", 3000, 11, 2500,
                               '"reference": "bay row", ', "")
    single = tmp_path / "single.jsonl"
    with pytest.raises(InputError, match="has no reference although earlier") as one:
        pipeline.apply_file(src, single, models={}, weights=WEIGHTS)
    with pytest.raises(InputError, match="has no reference although earlier") as two:
        pipeline.apply_file(src, tmp_path / "out.jsonl", models={}, weights=WEIGHTS,
                            workers=2, shard_bytes=100_000)
    assert one.value.line == two.value.line == 2501
    assert sorted(p.name for p in tmp_path.iterdir()) == ["mixed.jsonl"]


def test_character_unit_in_workers_byte_identical(tmp_path: Path) -> None:
    # the second demo's test set, a character model and its unit carried to each worker:
    # the same bytes as one process; a word run of the character model is refused there too
    chars = Counting("char")
    model_path = tmp_path / "chars.lm"
    model = NGramModel(order=4).fit(char_sentences(read_corpus([BUNDLED_KANA / "train.txt"])))
    save_model(model.mark_unit("char"), model_path)
    models = pipeline.load_lms([str(model_path)])
    weights = Weights(1.0, 0.5, 2.0, {})
    one, many = tmp_path / "one.jsonl", tmp_path / "many.jsonl"
    pipeline.apply_file(BUNDLED_KANA / "test.jsonl", one, models=models, weights=weights,
                        counting=chars)
    result = pipeline.apply_file(BUNDLED_KANA / "test.jsonl", many, models=models,
                                 weights=weights, counting=chars, workers=2, shard_bytes=20_000)
    assert result.shards > 1 and one.read_bytes() == many.read_bytes()
    with pytest.raises(InputError, match="built on characters"):
        pipeline.apply_file(BUNDLED_KANA / "test.jsonl", tmp_path / "w.jsonl", models=models,
                            weights=weights, workers=2, shard_bytes=20_000)
    assert not (tmp_path / "w.jsonl").exists()


def _fail_first(task: int) -> int:
    import time
    if task == 0:
        raise ValueError("shard 0 is bad")
    time.sleep(0.2)
    return task


def test_a_failed_shard_then_a_broken_pool_raises_nothing_in_the_pool_thread(
        monkeypatch: pytest.MonkeyPatch) -> None:
    # Python's ProcessPoolExecutor (3.11) marks every pending future failed when a worker
    # dies; a future this side had cancelled makes its own thread raise InvalidStateError,
    # which printed a stray traceback line after the one-line error (seen in CI). Here the
    # worker dies before abort() on purpose, the order that lost the race.
    import threading

    from rescore.parallel import _Runner

    raised: list[BaseException | None] = []
    monkeypatch.setattr(threading, "excepthook", lambda args: raised.append(args.exc_value))
    runner = _Runner(2, None)
    results = runner.map(_fail_first, list(range(40)))  # type: ignore[arg-type]
    with pytest.raises(ValueError, match="shard 0 is bad"):
        next(results)
    pool = runner._pool
    assert pool is not None
    manager: threading.Thread = getattr(pool, "_executor_manager_thread")  # noqa: B009
    for process in list(getattr(pool, "_processes").values()):  # noqa: B009
        process.terminate()
    manager.join(timeout=10)
    assert not manager.is_alive()
    runner.abort()
    assert raised == []
