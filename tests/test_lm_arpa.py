"""ARPA files: round trip of every method, a hand-written file, malformed files."""

from __future__ import annotations

import itertools
import math
from pathlib import Path

import numpy as np
import pytest

from rescore.errors import InputError, ModelFileError
from rescore.lm import METHODS, NGramModel, load_model, save_model

LOG10_TOL = 1e-6  # our tolerance for an ARPA round trip, in log10 (README, ARPA conventions)
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
    # line 16 of HAND is the 2-gram "pump on"
    msg = _malformed(tmp_path, HAND.replace("pump on\n", "vent on\n"))
    assert msg == "FILE:16: 2-gram: word 'vent' is not a unigram"
    assert "no \\data\\" in _malformed(tmp_path, "just text\n")


def test_data_block_without_counts(tmp_path: Path) -> None:
    # a file of only \data\ and \end\ declares no order at all: one located error
    msg = _malformed(tmp_path, "\\data\\\n\\end\\\n")
    assert msg == ("FILE:2: counts header: no 'ngram k=count' lines and no n-gram sections "
                   "before \\end\\")


@pytest.mark.parametrize(("old", "new", "count", "expected"), [
    # HAND's lines: 11 "pump", 12 "on", 15 "<s> pump", 16 "pump on", 19 "<s> pump on"; the
    # header count goes up by one with the extra entry
    ("-0.7\ton\t-0.1\n", "-0.7\ton\t-0.1\n-0.7\tpump\n", ("ngram 1=4", "ngram 1=5"),
     "FILE:13: 1-gram: 'pump' is listed twice (first on line 11)"),
    ("-0.2\tpump on\n", "-0.2\tpump on\n-0.3\t<s> pump\t-0.4\n", ("ngram 2=2", "ngram 2=3"),
     "FILE:17: 2-gram: '<s> pump' is listed twice (first on line 15)"),
    ("-0.1\t<s> pump on\n", "-0.1\t<s> pump on\n-0.2\t<s> pump on\n",
     ("ngram 3=2", "ngram 3=3"),
     "FILE:20: 3-gram: '<s> pump on' is listed twice (first on line 19)"),
])
def test_duplicate_ngram_names_its_line(tmp_path: Path, old: str, new: str,
                                        count: tuple[str, str], expected: str) -> None:
    assert _malformed(tmp_path, HAND.replace(old, new).replace(*count)) == expected


def _zipf_sentences(seed: int, n: int, v: int) -> list[list[str]]:
    """Word ranks drawn with P(r) ~ 1/r (Zipf's law for word frequencies, from memory)."""
    rng = np.random.default_rng(seed)
    p = 1.0 / np.arange(1, v + 1)
    return [[f"w{j}" for j in rng.choice(v, rng.integers(1, 10), p=p / p.sum())]
            for _ in range(n)]


def _positive_backoff_weights(path: Path) -> int:
    lines = path.read_text().splitlines()
    return sum(1 for x in lines if x.count("\t") == 2 and float(x.split("\t")[2]) > 0)


# (method, order, seed, sentences, vocabulary, threshold): each found to leave at least one
# context a back-off weight above one, which the test asserts so it cannot go stale
PRUNED_CASES = [
    ("wb", 3, 0, 300, 25, 1e-3),
    ("wb", 3, 2, 300, 25, 1e-3),
    ("kn", 3, 3, 300, 25, 1e-2),
    ("abs", 3, 0, 300, 25, 1e-2),
    ("mkn", 3, 1, 500, 40, 3e-3),
    ("mkn", 4, 0, 500, 40, 3e-4),
]


@pytest.mark.parametrize(("method", "order", "seed", "n", "v", "threshold"), PRUNED_CASES)
def test_pruned_model_round_trip(tmp_path: Path, method: str, order: int, seed: int, n: int,
                                 v: int, threshold: float) -> None:
    # ARPA back-off weights are log10 values and may be positive: pruning removes n-grams
    # whose lower-order estimate was larger, so 1 - sum P / (1 - sum P') can exceed one
    # (Stolcke 1998, the back-off weight after pruning; positive weights valid ARPA, from
    # memory). native -> ARPA -> native must keep every probability within 1e-6 in log10.
    sents = _zipf_sentences(seed, n, v)
    model = NGramModel(order, method, prune=threshold).fit(sents)
    save_model(model, tmp_path / "m.lm")
    native = load_model(tmp_path / "m.lm")
    save_model(native, tmp_path / "m.arpa")
    assert _positive_backoff_weights(tmp_path / "m.arpa") > 0
    back = load_model(tmp_path / "m.arpa")
    save_model(back, tmp_path / "again.lm")
    again = load_model(tmp_path / "again.lm")
    words = list(model.vocab_.words)
    histories: list[list[str]] = [[], ["never-seen"] * (order - 1)]
    for k in range(1, order):
        histories += [[words[i] for i in row] for row in model.tables_.words_of(k).tolist()]
    grams = [[*h, w] for h in histories for w in words if w != "<s>"]
    want = model.logprob_ngrams(grams)
    for other in (back, again):
        got = other.logprob_ngrams(grams)
        assert np.array_equal(np.isfinite(got), np.isfinite(want))
        finite = np.isfinite(want)
        assert np.max(np.abs(got[finite] - want[finite])) / LN10 < LOG10_TOL
        np.testing.assert_allclose(other.logprob(sents[:50]) / LN10,
                                   model.logprob(sents[:50]) / LN10, atol=50 * LOG10_TOL)


def test_positive_backoff_weight_is_applied(tmp_path: Path) -> None:
    # a positive log10 weight multiplies the lower order by more than one (the back-off
    # rule P(w | h) = bow(h) P(w | h'), from memory): bow(pump) = +0.2, P(on) = -0.7
    path = tmp_path / "hand.arpa"
    path.write_text(HAND.replace("-0.6\tpump\t-0.2", "-0.6\tpump\t0.2"))
    got = load_model(path).logprob_ngrams([["pump", "pump"]]) / LN10
    assert got[0] == pytest.approx(0.2 - 0.6, abs=1e-12)


@pytest.mark.parametrize(("field", "text", "replace"), [
    ("probability", "-0.6\tpump", "0.25\tpump"),
    ("probability", "-0.6\tpump", "nan\tpump"),
    ("back-off weight", "pump\t-0.2", "pump\tinf"),
    ("back-off weight", "pump\t-0.2", "pump\tnan"),
])
def test_probability_above_zero_and_nonfinite_weight_refused(
    tmp_path: Path, field: str, text: str, replace: str
) -> None:
    # a probability's log10 is at most 0; a weight is a finite log10 number (from memory)
    msg = _malformed(tmp_path, HAND.replace(text, replace))
    assert msg.startswith(f"FILE:11: {field}: ")


@pytest.mark.parametrize(("on", "bos_bow", "p_on", "p_on_after_bos"), [
    # exactly -99 is the conventional zero (as <s> is written, from memory)
    ("-99", "-0.5", -math.inf, -math.inf),
    # anything below -99 is a legal, tiny log10 value and is read as what it is
    ("-120", "-0.5", -120.0, -120.5),
    ("-0.7", "-150", -0.7, -150.7),
    ("-0.7", "-99", -0.7, -math.inf),  # a weight of exactly -99 is a zero weight
])
def test_minus_99_is_zero_and_lower_values_are_tiny(
    tmp_path: Path, on: str, bos_bow: str, p_on: float, p_on_after_bos: float
) -> None:
    # back-off rule: P(on | <s>) = bow(<s>) + P(on) in log10, "<s> on" not listed (from memory)
    path = tmp_path / "hand.arpa"
    path.write_text(HAND.replace("-0.7\ton\t-0.1", f"{on}\ton\t-0.1")
                    .replace("-99\t<s>\t-0.5", f"-99\t<s>\t{bos_bow}"))
    got = load_model(path).logprob_ngrams([["on"], ["<s>", "on"]]) / LN10
    np.testing.assert_allclose(got, [p_on, p_on_after_bos], rtol=0, atol=1e-9)


@pytest.mark.parametrize("value", ["-150", "-99.00000000001", "-98.999999999"])
def test_tiny_probability_survives_a_write(tmp_path: Path, value: str) -> None:
    # a finite value must not come back as the -99 zero (within the 1e-6 ARPA tolerance)
    path = tmp_path / "hand.arpa"
    path.write_text(HAND.replace("-0.7\ton\t-0.1", f"{value}\ton\t-0.1"))
    save_model(load_model(path), tmp_path / "again.arpa")
    got = load_model(tmp_path / "again.arpa").logprob_ngrams([["on"]])[0] / LN10
    assert got == pytest.approx(float(value), abs=LOG10_TOL)


def test_runaway_line_is_refused(tmp_path: Path) -> None:
    # an n-gram line is a few words and numbers; a megabyte line is damage, not a model
    path = tmp_path / "bad.arpa"
    path.write_text(HAND.replace("-0.6\tpump", "-0.6\t" + "p" * (1 << 20)))
    with pytest.raises(InputError, match=r":11: line longer than the limit of 1 MiB$"):
        load_model(path)
