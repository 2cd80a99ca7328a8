"""Property-based fuzzing of every reader: random and mutated input gives only our errors.

`make test` runs 2,000 examples per reader; `make fuzz` runs many more
(RESCORE_FUZZ_EXAMPLES). Any exception other than the project's InputError is a defect.
"""

from __future__ import annotations

import gzip
import os
import tempfile
from collections.abc import Callable
from pathlib import Path
from typing import Any

from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st

from rescore.errors import InputError
from rescore.nbest import read_nbest, read_refs
from tests.conftest import FIXTURES

EXAMPLES = int(os.environ.get("RESCORE_FUZZ_EXAMPLES", "2000"))
FUZZ = settings(max_examples=EXAMPLES, deadline=None,
                suppress_health_check=[HealthCheck.too_slow, HealthCheck.data_too_large])


def _mutations(seed: bytes) -> st.SearchStrategy[bytes]:
    """Valid bytes with a few random edits: flips, deletions, insertions, truncation."""

    @st.composite
    def mutate(draw: st.DrawFn) -> bytes:
        data = bytearray(seed)
        for _ in range(draw(st.integers(1, 6))):
            kind = draw(st.sampled_from(["flip", "delete", "insert", "truncate", "dup"]))
            if not data:
                break
            at = draw(st.integers(0, len(data) - 1))
            if kind == "flip":
                data[at] = draw(st.integers(0, 255))
            elif kind == "delete":
                del data[at:at + draw(st.integers(1, 8))]
            elif kind == "insert":
                data[at:at] = draw(st.binary(min_size=1, max_size=8)) if draw(st.booleans()) \
                    else draw(st.sampled_from([b'"', b"{", b"}", b"[", b",", b":", b"\n",
                                               b"NaN", b"1e999", b"-", b"\\u00", b"null"]))
            elif kind == "truncate":
                del data[at:]
            else:
                data[at:at] = data[at:at + 40]
        return bytes(data)

    return mutate()


def fuzz_reader(read: Callable[[Path], Any], seed: bytes, suffix: str = ".txt"
                ) -> Callable[[bytes], None]:
    def check(data: bytes) -> None:
        with tempfile.TemporaryDirectory() as folder:
            path = Path(folder) / f"input{suffix}"
            path.write_bytes(data)
            try:
                read(path)
            except InputError as exc:
                text = str(exc)
                assert text.startswith(str(path)) and "\n" not in text, text
    return check


NBEST_SEED = (FIXTURES / "nbest_two_utterances.jsonl").read_bytes() + \
    (FIXTURES / "nbest_log10_costs.jsonl").read_bytes()
REFS_SEED = (FIXTURES / "refs_two_utterances.tsv").read_bytes()


@FUZZ
@given(st.one_of(_mutations(NBEST_SEED), _mutations(gzip.compress(NBEST_SEED)),
                 st.binary(max_size=300)))
def test_fuzz_nbest_reader(data: bytes) -> None:
    fuzz_reader(lambda p: list(read_nbest(p)), NBEST_SEED, ".jsonl")(data)


@FUZZ
@given(st.one_of(_mutations(REFS_SEED), st.binary(max_size=200)))
def test_fuzz_refs_reader(data: bytes) -> None:
    fuzz_reader(read_refs, REFS_SEED, ".tsv")(data)


# --- language-model files, corpus text and weights files ---------------------------------

def _lm_seeds() -> tuple[bytes, bytes]:
    from rescore.lm import NGramModel, save_model

    model = NGramModel(order=2, method="kn").fit([["vent", "bay", "three"], ["bay", "three"],
                                                  ["row", "two", "opened"]])
    with tempfile.TemporaryDirectory() as folder:
        save_model(model, Path(folder) / "m.arpa")
        save_model(model, Path(folder) / "m.lm")
        return (Path(folder) / "m.arpa").read_bytes(), (Path(folder) / "m.lm").read_bytes()


ARPA_SEED, NATIVE_SEED = _lm_seeds()
WEIGHTS_SEED = (b'{"acoustic_scale": 1.0, "lm_weight": 0.8, "insertion_penalty": -0.5, '
                b'"features": {"first_pass_lm": 2.0}}')
CORPUS_SEED = "vent bay three opened\nrow two, lamp bank four dimmed.\n\nprīya's shift\n".encode()


@FUZZ
@given(st.one_of(_mutations(ARPA_SEED), st.binary(max_size=300)))
def test_fuzz_arpa_reader(data: bytes) -> None:
    from rescore.lm import load_model

    fuzz_reader(load_model, ARPA_SEED, ".arpa")(data)


@FUZZ
@given(st.one_of(_mutations(NATIVE_SEED), st.binary(max_size=300)))
def test_fuzz_native_model_reader(data: bytes) -> None:
    from rescore.lm import load_model

    fuzz_reader(load_model, NATIVE_SEED, ".lm")(data)


@FUZZ
@given(st.one_of(_mutations(WEIGHTS_SEED), st.binary(max_size=200)))
def test_fuzz_weights_reader(data: bytes) -> None:
    from rescore.tune import read_weights

    fuzz_reader(read_weights, WEIGHTS_SEED, ".json")(data)


@FUZZ
@given(st.one_of(_mutations(CORPUS_SEED), _mutations(gzip.compress(CORPUS_SEED)),
                 st.binary(max_size=200)))
def test_fuzz_corpus_reader(data: bytes) -> None:
    from rescore.lm import read_corpus

    fuzz_reader(lambda p: list(read_corpus([p])), CORPUS_SEED, ".txt")(data)
