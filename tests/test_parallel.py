"""Parallel rescoring: worker processes and a real Dask LocalCluster give the same bytes."""

from __future__ import annotations

import json
from pathlib import Path

import numpy as np
import pytest

from rescore import pipeline
from rescore.errors import InputError
from rescore.scoring import Weights

WEIGHTS = Weights(1.0, 0.0, 0.7, {"first_pass_lm": 4.0})


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


def _apply(src: Path, out: Path, **kw: object) -> tuple[bytes, bytes]:
    tsv = out.with_suffix(".tsv")
    pipeline.apply_file(src, out, models={}, weights=WEIGHTS, text_path=tsv, **kw)  # type: ignore[arg-type]
    return out.read_bytes(), tsv.read_bytes()


def test_workers_and_local_cluster_byte_identical(generated: Path, tmp_path: Path) -> None:
    single = _apply(generated, tmp_path / "single.jsonl", batch_size=500)
    pooled = _apply(generated, tmp_path / "pooled.jsonl", workers=2, batch_size=500)
    assert pooled == single
    dasked = _apply(generated, tmp_path / "dask.jsonl", workers=2, cluster="local")
    assert dasked == single
    assert single[0].count(b"\n") == 20_000
    leftovers = [p.name for p in tmp_path.iterdir() if p.name.startswith(".rescore-tmp")]
    assert leftovers == []


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
    src = tmp_path / "bad.jsonl"
    _generate(src, 2000, seed=9)
    lines = src.read_text().splitlines()
    lines[1500] = lines[1500].replace('"acoustic"', '"acoustik"', 1)
    src.write_text("\n".join(lines) + "\n")
    with pytest.raises(InputError) as e:
        pipeline.apply_file(src, tmp_path / "out.jsonl", models={}, weights=WEIGHTS, workers=2)
    assert (e.value.path, e.value.line) == (str(src), 1501)
    assert e.value.field is not None and "acoustik" in e.value.field
