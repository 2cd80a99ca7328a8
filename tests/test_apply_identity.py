"""``apply`` writes the same bytes as before the structural rework, and picks what the
plain reference rule picks.

The SHA-256 values below were recorded by running this module's ``_outputs`` with the
code of main at commit d9fbfe2 (before rescore/weights.py and the one choice kernel):
``PYTHONPATH=. python -c 'from tests.test_apply_identity import _print; _print()'``.
A change of them means ``apply`` output changed: that must be a deliberate change of
behaviour, recorded in CHANGELOG.md, not a side effect of moving code. The one such change
since: the hypothesis field ``words`` is named ``word_count``; the check undoes that rename
and nothing else, so every other byte is still the recorded one.
"""

from __future__ import annotations

import hashlib
import json
from pathlib import Path

import numpy as np
import pytest

from rescore import pipeline
from rescore.lm import NGramModel, read_corpus, save_model
from rescore.weights import Weights
from tests.bulk import write_bulk

ROOT = Path(__file__).resolve().parent.parent
DEMO = ROOT / "fixtures" / "demo"
DEMO_WEIGHTS = Weights(1.0, 9.0, 2.0, {"first_pass_lm": 0.5})
BULK_WEIGHTS = Weights(0.8, 0.0, 0.7, {"first_pass_lm": 4.0})

# recorded with main at d9fbfe2 (see the module docstring)
EXPECTED = {
    "demo.jsonl": "54e7ef298d091ecc7144d01afe928beea807b1d028c1e4e77d86cb1b7e29aa85",
    "demo.tsv": "a692406fe054285d7de2a12160a2b6d04e030683ad3d8f583cf1db37d4967a80",
    "bulk.jsonl": "2ed489e083fe5d41c4f79aaaa4b6d1021db7be4895dfd690c08be1d584d702db",
    "bulk.tsv": "350e523b83fe479752c67509296e0b5d7a325b8d0cd0ad94f78e1197666ff6e1",
}


def _outputs(folder: Path) -> dict[str, Path]:
    lm = folder / "train.lm"
    save_model(NGramModel(3, "mkn").fit(read_corpus(DEMO / "train.txt")), lm)
    bulk = folder / "bulk-in.jsonl"
    write_bulk(bulk, 3000, depth=7, seed=3)
    out = {name: folder / name for name in EXPECTED}
    pipeline.apply_file(DEMO / "test.jsonl", out["demo.jsonl"], text_path=out["demo.tsv"],
                        models=pipeline.load_lms([str(lm)]), weights=DEMO_WEIGHTS)
    pipeline.apply_file(bulk, out["bulk.jsonl"], text_path=out["bulk.tsv"], models={},
                        weights=BULK_WEIGHTS, batch_size=257)
    return out


def _sha(path: Path) -> str:
    return hashlib.sha256(path.read_bytes()).hexdigest()


def _sha_before_rename(path: Path) -> str:
    # the records as the recorded code wrote them: "words", where "word_count" is now
    return hashlib.sha256(path.read_bytes().replace(b'"word_count":', b'"words":')).hexdigest()


def _print() -> None:  # pragma: no cover - the recording step named in the docstring
    import tempfile

    with tempfile.TemporaryDirectory() as tmp:
        for name, path in _outputs(Path(tmp)).items():
            print(f'    "{name}": "{_sha_before_rename(path)}",')


@pytest.fixture(scope="module")
def outputs(tmp_path_factory: pytest.TempPathFactory) -> dict[str, Path]:
    return _outputs(tmp_path_factory.mktemp("identity"))


@pytest.mark.parametrize("name", sorted(EXPECTED))
def test_apply_output_bytes_unchanged(outputs: dict[str, Path], name: str) -> None:
    assert b'"words":' not in outputs[name].read_bytes()
    assert _sha_before_rename(outputs[name]) == EXPECTED[name]


def _plain_choice(utt: dict[str, object], weights: Weights) -> int:
    """The contract's rule written out per hypothesis: the highest total
    ``acoustic_scale * acoustic + lm_weight * lm + insertion_penalty * words
    + sum w_k * features[k]`` wins, the earlier hypothesis on ties."""
    best, best_total = 0, -np.inf
    for h, hyp in enumerate(utt["hypotheses"]):  # type: ignore[attr-defined]
        total = (weights.acoustic_scale * hyp["acoustic"] + weights.lm_weight * hyp.get("lm", 0.0)
                 + weights.insertion_penalty * hyp["word_count"]
                 + sum(w * hyp["features"][k] for k, w in weights.features.items()))
        if total > best_total:
            best, best_total = h, total
    return best


@pytest.mark.parametrize(("name", "weights"), [("demo.jsonl", DEMO_WEIGHTS),
                                               ("bulk.jsonl", BULK_WEIGHTS)])
def test_apply_chooses_what_the_plain_rule_chooses(outputs: dict[str, Path], name: str,
                                                   weights: Weights) -> None:
    records = [json.loads(line) for line in outputs[name].read_text().splitlines()]
    assert records
    assert [r["best"] for r in records] == [_plain_choice(r, weights) for r in records]
