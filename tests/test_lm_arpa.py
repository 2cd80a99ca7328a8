"""ARPA files: round trip of every method, a hand-written file, malformed files."""

from __future__ import annotations

import itertools
import math
from pathlib import Path

import numpy as np
import pytest

from rescore.errors import ModelFileError
from rescore.lm import METHODS, NGramModel, load_model, save_model

LOG10_TOL = 1e-6  # the tolerance for an ARPA round trip, in log10
LN10 = math.log(10)


def _all_ngrams(model: NGramModel) -> list[list[str]]:
    words = list(model.vocab_.words)
    predicted = [w for w in words if w != "<s>"]
    return [[*h, w] for n in range(model.order_) for h in itertools.product(words, repeat=n)
            for w in predicted]


@pytest.mark.parametrize("method", list(METHODS))
@pytest.mark.parametrize("order", [1, 2, 3, 4])
@pytest.mark.parametrize("suffix", [".arpa", ".arpa.gz"])
def test_round_trip_every_word_every_context(
    tmp_path: Path, method: str, order: int, suffix: str
) -> None:
    rng = np.random.default_rng(order)
    sents = [["abcde"[j] for j in rng.integers(0, 5, rng.integers(0, 7))] for _ in range(30)]
    model = NGramModel(order, method, cutoffs=[1] * (order - 1)).fit(sents)
    path = tmp_path / f"m{suffix}"
    save_model(model, path)
    back = load_model(path)
    grams = _all_ngrams(model)
    a, b = model.logprob_ngrams(grams), back.logprob_ngrams(grams)
    assert np.array_equal(np.isfinite(a), np.isfinite(b))
    finite = np.isfinite(a)
    assert np.max(np.abs(a[finite] - b[finite])) / LN10 < LOG10_TOL


def test_arpa_text_follows_conventions(tmp_path: Path) -> None:
    model = NGramModel(3, "mkn").fit([["pump", "on"], ["pump", "off"]])
    path = tmp_path / "m.arpa"
    save_model(model, path)
    lines = path.read_text().splitlines()
    assert lines[1] == "\\data\\" and lines[-1] == "\\end\\"
    bos = next(x for x in lines if x.split("\t")[1:2] == ["<s>"])
    assert bos.split("\t")[0] == "-99"  # <s> is never predicted
    top = lines[lines.index("\\3-grams:") + 1:-2]
    assert top and all(len(x.split("\t")) == 2 for x in top)  # no back-off column at the top
    two = lines[lines.index("\\2-grams:") + 1:lines.index("\\3-grams:") - 1]
    assert all(len(x.split("\t")) == 3 for x in two)


def test_native_to_arpa_to_native_convert(tmp_path: Path) -> None:
    model = NGramModel(2, "wb", closed_vocab=True).fit([["a", "b"], ["b"]])
    save_model(model, tmp_path / "m.lm")
    save_model(load_model(tmp_path / "m.lm"), tmp_path / "m.arpa")
    back = load_model(tmp_path / "m.arpa")
    assert back.closed_vocab  # no <unk> in the file
    probe = [["a", "b", "zzz"]]
    np.testing.assert_allclose(back.logprob(probe), model.logprob(probe), atol=1e-9)


# A hand-written back-off file (our own, not written by this program). "<s> on" is only a
# context through <s>'s weight; the 3-gram "<s> on pump" has no listed suffix "on pump".
HAND = """some free text before the data block is allowed

\\data\\
ngram 1=4
ngram 2=2
ngram 3=2

\\1-grams:
-99\t<s>\t-0.5
-0.5\t</s>
-0.6\tpump\t-0.2
-0.7\ton\t-0.1

\\2-grams:
-0.3\t<s> pump\t-0.4
-0.2\tpump on

\\3-grams:
-0.1\t<s> pump on
-0.25\t<s> on pump

\\end\\
"""


@pytest.mark.parametrize(
    ("sentence", "log10"),
    [
        # P(pump|<s>) + P(on|<s> pump) + [bow(pump on)=0, bow(on) + P(</s>)]
        (["pump", "on"], -0.3 - 0.1 + (-0.1 - 0.5)),
        # [bow(<s>) + P(on)] + P(pump|<s> on) + [bow(pump) + P(</s>)]
        (["on", "pump"], (-0.5 - 0.7) - 0.25 + (-0.2 - 0.5)),
        # P(pump|<s>) + [bow(<s> pump) + bow(pump) + P(</s>)]
        (["pump"], -0.3 + (-0.4 - 0.2 - 0.5)),
    ],
)
def test_hand_written_backoff_file(tmp_path: Path, sentence: list[str], log10: float) -> None:
    path = tmp_path / "hand.arpa"
    path.write_text(HAND)
    model = load_model(path)
    assert model.closed_vocab  # no <unk> listed
    assert model.logprob([sentence])[0] / LN10 == pytest.approx(log10, abs=1e-12)


def test_hand_written_missing_suffix_backs_off(tmp_path: Path) -> None:
    path = tmp_path / "hand.arpa"
    path.write_text(HAND)
    model = load_model(path)
    # "on pump" is not listed: bow(on) + P(pump) = -0.1 - 0.6
    got = model.logprob_ngrams([["on", "pump"], ["<s>", "on", "pump"]]) / LN10
    np.testing.assert_allclose(got, [-0.7, -0.25], atol=1e-12)


def _malformed(tmp_path: Path, text: str) -> str:
    path = tmp_path / "bad.arpa"
    path.write_text(text)
    with pytest.raises(ModelFileError) as info:
        load_model(path)
    message = str(info.value)
    assert "\n" not in message
    return message.replace(str(path), "FILE")


def test_malformed_counts_header(tmp_path: Path) -> None:
    msg = _malformed(tmp_path, HAND.replace("ngram 2=2", "ngram 3=2"))
    assert msg.startswith("FILE:5: counts header: expected 'ngram 2=COUNT'")


def test_malformed_count_mismatch(tmp_path: Path) -> None:
    msg = _malformed(tmp_path, HAND.replace("ngram 1=4", "ngram 1=5"))
    assert msg.startswith("FILE:14: counts header: 4 1-grams listed, header says 5")


def test_malformed_field_count(tmp_path: Path) -> None:
    msg = _malformed(tmp_path, HAND.replace("-0.1\t<s> pump on", "-0.1\t<s> pump on\t-0.3"))
    assert msg == "FILE:19: 3-gram: expected 4 fields, got 5"


def test_malformed_number(tmp_path: Path) -> None:
    msg = _malformed(tmp_path, HAND.replace("-0.6\tpump", "minus\tpump"))
    assert msg == "FILE:11: probability: not a number: 'minus'"


def test_missing_end(tmp_path: Path) -> None:
    msg = _malformed(tmp_path, HAND.replace("\\end\\\n", ""))
    assert "missing \\end\\" in msg and msg.startswith("FILE:21:")  # the last line read


def test_unknown_word_and_no_data(tmp_path: Path) -> None:
    assert "'vent' is not a unigram" in _malformed(tmp_path, HAND.replace("pump on\n", "vent on\n"))
    assert "no \\data\\" in _malformed(tmp_path, "just text\n")
