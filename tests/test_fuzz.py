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

from hypothesis import HealthCheck, example, given, settings
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

def _lm_seeds() -> tuple[bytes, bytes, bytes]:
    from rescore.lm import NGramModel, save_model

    model = NGramModel(order=2, method="kn").fit([["vent", "bay", "three"], ["bay", "three"],
                                                  ["row", "two", "opened"]])
    # entropy pruning leaves some contexts a back-off weight above one (a positive log10)
    import numpy as np

    rng = np.random.default_rng(4)
    words = ["vent", "bay", "three", "row", "two", "opened", "lamp", "four"]
    sents = [[words[j] for j in rng.integers(0, 8, rng.integers(1, 7))] for _ in range(40)]
    pruned = NGramModel(order=3, method="wb", prune=1e-2).fit(sents)
    with tempfile.TemporaryDirectory() as folder:
        save_model(model, Path(folder) / "m.arpa")
        save_model(model, Path(folder) / "m.lm")
        save_model(pruned, Path(folder) / "p.arpa")
        return ((Path(folder) / "m.arpa").read_bytes(), (Path(folder) / "m.lm").read_bytes(),
                (Path(folder) / "p.arpa").read_bytes())


ARPA_SEED, NATIVE_SEED, PRUNED_ARPA_SEED = _lm_seeds()
WEIGHTS_SEED = (b'{"acoustic_scale": 1.0, "lm_weight": 0.8, "insertion_penalty": -0.5, '
                b'"features": {"first_pass_lm": 2.0}}')
CORPUS_SEED = "vent bay three opened\nrow two, lamp bank four dimmed.\n\nprīya's shift\n".encode()
ARPA_VALUES = ["-99", "-99.0", "-120", "-1e300", "0", "0.25", "-0.5", "inf", "-inf", "nan",
               "1e999", "x", ""]


def _arpa_line_edits(seed: bytes) -> st.SearchStrategy[bytes]:
    """Whole-line edits of a valid ARPA file, the shapes a damaged or hand-edited file takes:
    a repeated, moved or lost line, a word missing from the 1-grams, odd numbers, counts."""

    @st.composite
    def edit(draw: st.DrawFn) -> bytes:
        lines = seed.decode().split("\n")
        for _ in range(draw(st.integers(1, 4))):
            if not lines:
                break
            at = draw(st.integers(0, len(lines) - 1))
            kind = draw(st.sampled_from(["delete", "dup", "move", "value", "word", "count",
                                         "cut"]))
            fields = lines[at].split("\t")
            if kind == "delete":
                del lines[at]
            elif kind == "dup":
                lines.insert(draw(st.integers(0, len(lines))), lines[at])
            elif kind == "move":
                lines.insert(draw(st.integers(0, len(lines) - 1)), lines.pop(at))
            elif kind == "value":
                fields[draw(st.sampled_from([0, -1]))] = draw(st.sampled_from(ARPA_VALUES))
                lines[at] = "\t".join(fields)
            elif kind == "word" and len(fields) > 1:
                words = fields[1].split(" ")
                words[draw(st.integers(0, len(words) - 1))] = draw(
                    st.sampled_from(["<s>", "</s>", "<unk>", "vent", "never-listed", ""]))
                fields[1] = " ".join(words)
                lines[at] = "\t".join(fields)
            elif kind == "count" and lines[at].startswith("ngram "):
                lines[at] = f"ngram {draw(st.integers(0, 8))}={draw(st.integers(0, 40))}"
            elif kind == "cut":
                del lines[at:]
        return "\n".join(lines).encode()

    return edit()


@FUZZ
@given(st.one_of(_mutations(ARPA_SEED), _mutations(PRUNED_ARPA_SEED),
                 _mutations(gzip.compress(PRUNED_ARPA_SEED)),
                 _arpa_line_edits(ARPA_SEED), _arpa_line_edits(PRUNED_ARPA_SEED),
                 st.binary(max_size=300)))
# shapes that once escaped as an internal error, or lost their line number
@example(b"\\data\\\n\\end\\\n")
@example(b"\\data\\\nngram 1=2\n\\1-grams:\n-1\ta\n-1\ta\n\\end\\\n")
@example(b"\\data\\\nngram 1=1\nngram 2=2\n\\1-grams:\n-1\ta\t0\n\\2-grams:\n-1\ta a\n"
         b"-1\ta a\n\\end\\\n")
@example(b"\\data\\\nngram 1=1\nngram 2=1\n\\1-grams:\n-1\ta\t0\n\\2-grams:\n-1\ta b\n"
         b"\\end\\\n")
@example(b"\\data\\\nngram 1=" + b"9" * 5000 + b"\n\\end\\\n")
def test_fuzz_arpa_reader(data: bytes) -> None:
    from rescore.lm import load_model

    fuzz_reader(load_model, ARPA_SEED, ".arpa")(data)


def test_pruned_arpa_seed_has_positive_backoff_weight() -> None:
    # the seed must hold a positive log10 back-off weight, which is valid ARPA (from memory)
    lines = PRUNED_ARPA_SEED.decode().splitlines()
    assert max(float(x.split("\t")[2]) for x in lines if x.count("\t") == 2) > 0


@FUZZ
@given(st.one_of(_mutations(NATIVE_SEED), st.binary(max_size=300)))
def test_fuzz_native_model_reader(data: bytes) -> None:
    from rescore.lm import load_model

    fuzz_reader(load_model, NATIVE_SEED, ".lm")(data)


@FUZZ
@given(st.one_of(_mutations(WEIGHTS_SEED), st.binary(max_size=200)))
def test_fuzz_weights_reader(data: bytes) -> None:
    from rescore.weights import read_weights

    fuzz_reader(read_weights, WEIGHTS_SEED, ".json")(data)


@FUZZ
@given(st.one_of(_mutations(CORPUS_SEED), _mutations(gzip.compress(CORPUS_SEED)),
                 st.binary(max_size=200)))
def test_fuzz_corpus_reader(data: bytes) -> None:
    from rescore.lm import read_corpus

    fuzz_reader(lambda p: list(read_corpus([p])), CORPUS_SEED, ".txt")(data)
