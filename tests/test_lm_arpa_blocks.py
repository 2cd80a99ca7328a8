"""The block paths of ARPA reading and writing: numbers read with integer arithmetic, words
of every size, blocks of any size, numbers written by masks; each against a reference."""

from __future__ import annotations

import math
from pathlib import Path

import numpy as np
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st

from rescore.lm import NGramModel, arpa, arpa_fast, arpa_text, save_model, store
from rescore.lm.arpa_numbers import MARGIN, chunks, parse_fields
from rescore.lm.tables import BackoffTables

LN10 = math.log(10)


def _parse(texts: list[str]) -> tuple[list[float], list[bool]]:
    """parse_fields over texts laid out as in a block, tab-separated."""
    data = "\t".join(texts).encode("ascii") + b"\n"
    raw = bytearray(MARGIN + len(data) + 16)
    raw[MARGIN:MARGIN + len(data)] = data
    buf = np.frombuffer(raw, dtype=np.uint8)
    start, point, end, at = [], [], [], MARGIN
    for t in texts:
        start.append(at)
        end.append(at + len(t))
        point.append(at + t.index(".") if "." in t else at + len(t))
        at += len(t) + 1
    values, ok = parse_fields(chunks(raw), buf, np.array(start), np.array(point),
                              np.array(end))
    return values.tolist(), ok.tolist()


def _same_double(a: float, b: float) -> bool:
    return a == b and math.copysign(1.0, a) == math.copysign(1.0, b)


_DIGITS = st.text(alphabet="0123456789", max_size=17)


@settings(max_examples=300, deadline=None)
@given(st.lists(st.tuples(st.sampled_from(["", "-"]), _DIGITS, st.sampled_from(["", "."]),
                          _DIGITS), min_size=1, max_size=40))
def test_number_parse_is_floats(parts: list[tuple[str, str, str, str]]) -> None:
    # Python's float() is the reference: the correctly rounded double (IEEE 754 round to
    # nearest, ties to even) of the decimal. A text of 1 to 15 digits must be read by the
    # integer path (below 2**53 over an exact power of ten: one correctly rounded IEEE 754
    # division gives that same double); longer ones are left to numpy's parse
    texts = [sign + whole + point + frac for sign, whole, point, frac in parts]
    texts = [t if t not in ("", "-") else t + "0" for t in texts]
    values, ok = _parse(texts)
    for text, value, done in zip(texts, values, ok, strict=True):
        digits = sum(c.isdigit() for c in text)
        assert done == (1 <= digits <= 15), text
        if done:
            assert _same_double(value, float(text)), text


@pytest.mark.parametrize(("text", "done"), [
    ("0", True), ("-0", True), ("-0.0", True), ("0.", True), ("-.5", True),  # from memory:
    ("-99", True), ("0.1", True), ("-0.30103", True),  # all are valid float() texts
    ("123456789012345", True), ("0.00000000000001", True), ("-9.999999999999999", False),
    ("9007199254740993", False),  # 2**53 + 1: 16 digits, not an exact double
    ("-1.5e-05", False), ("1E5", False), ("+1", False), ("1.2.3", False), (".", False),
    ("-", False), ("--1", False), ("1-", False), ("0x1p3", False), ("inf", False),
])
def test_number_parse_hard_cases(text: str, done: bool) -> None:
    # float() is the reference where the integer path reads the text; every other form
    # (exponents, signs other than a leading minus, more than 15 digits) is left aside
    values, ok = _parse([text])
    assert ok == [done]
    if done:
        assert _same_double(values[0], float(text))


def _save_arpa(model: NGramModel, path: Path) -> Path:
    save_model(model, path)
    return path


def _native_bytes(tables: BackoffTables, meta: dict[str, object], path: Path) -> bytes:
    store.save(tables, dict(meta), path)
    return path.read_bytes()


def test_words_of_every_size_read_as_the_exact_reader(tmp_path: Path) -> None:
    # the exact line reader is the reference: words of 1 to 20 bytes (across the 8- and
    # 16-byte sizes of the hash tables), words sharing their first 8 or 16 bytes, words
    # with points and non-ASCII letters: the fast path reads them all, to the same model
    stems = ["a", "abcdefg", "abcdefgh", "abcdefghi", "abcdefghX", "abcdefghijklmnop",
             "abcdefghijklmnoq", "abcdefghijklmnopq", "abcdefghijklmnopqrst", "a.b", "e.g.",
             "3.5", "ünï", "x" * 20]
    rng = np.random.default_rng(3)
    corpus = [[stems[j] for j in rng.integers(0, len(stems), rng.integers(1, 8))]
              for _ in range(300)]
    path = _save_arpa(NGramModel(3, "mkn").fit(corpus), tmp_path / "m.arpa")
    with open(path, "rb") as fh:
        fast, meta = arpa_fast.read_fast(fh)  # raises Slow if the fast path gives up
    exact, exact_meta = arpa.read_exact(path)
    assert meta == exact_meta
    assert (_native_bytes(fast, meta, tmp_path / "a.lm")
            == _native_bytes(exact.compact(), exact_meta, tmp_path / "b.lm"))


@pytest.mark.parametrize("block", [1, 7, 100, 4096])
def test_blocks_of_any_size_read_alike(tmp_path: Path, monkeypatch: pytest.MonkeyPatch,
                                       block: int) -> None:
    # the reading of the whole file at once is the reference: lines cut by the ends of
    # reads, carried over to the next block, give the same native file byte for byte
    rng = np.random.default_rng(4)
    corpus = [[f"w{j}" for j in rng.integers(0, 30, rng.integers(1, 10))] for _ in range(200)]
    path = _save_arpa(NGramModel(4, "kn").fit(corpus), tmp_path / "m.arpa")
    with open(path, "rb") as fh:
        whole = _native_bytes(*arpa_fast.read_fast(fh), tmp_path / "a.lm")
    monkeypatch.setattr(arpa_fast, "BLOCK_BYTES", block)
    with open(path, "rb") as fh:
        assert _native_bytes(*arpa_fast.read_fast(fh), tmp_path / "b.lm") == whole


def test_a_suffix_missing_from_the_file_is_left_to_the_exact_reader(tmp_path: Path) -> None:
    # ARPA convention (common practice): every n-gram's suffix is listed one order down;
    # a 3-gram whose 2-gram suffix was removed makes the fast reader give up (its key
    # cannot be made), and the exact reader (which adds the suffix) reads the file
    corpus = [["a", "b", "c", "d"], ["b", "c", "a"], ["c", "a", "b", "d"]] * 5
    path = _save_arpa(NGramModel(3, "mkn").fit(corpus), tmp_path / "m.arpa")
    lines = path.read_text().splitlines()
    section = lines.index("\\2-grams:")
    gone = next(i for i in range(section + 1, len(lines)) if lines[i].endswith("\tc a")
                or "\tc a\t" in lines[i])
    del lines[gone]
    count = next(i for i, line in enumerate(lines) if line.startswith("ngram 2="))
    lines[count] = f"ngram 2={int(lines[count].split('=')[1]) - 1}"
    path.write_text("\n".join(lines) + "\n")
    with open(path, "rb") as fh, pytest.raises(arpa_fast.Slow):
        arpa_fast.read_fast(fh)
    tables, _ = arpa.read(path)
    assert tables.order == 3


def test_numbers_of_other_forms_read_as_the_exact_reader(tmp_path: Path) -> None:
    # the exact line reader (float() on each field) is the reference: numbers with
    # exponents or 17 significant digits leave the integer path for numpy's parse, still
    # on the fast path, and give the same doubles
    model = NGramModel(3, "mkn").fit([[f"w{j}" for j in range(i % 7, i % 7 + 5)]
                                      for i in range(60)])
    good = _save_arpa(model, tmp_path / "good.arpa")
    lines = good.read_text().splitlines()
    out = []
    for i, line in enumerate(lines):
        fields = line.split("\t")
        if len(fields) >= 2 and fields[0] not in ("-99",):
            form = ("{:.16e}", "{:.17g}", "{:.6E}")[i % 3]
            fields[0] = form.format(float(fields[0]))
            if len(fields) == 3 and i % 2:
                fields[2] = form.format(float(fields[2]))
        out.append("\t".join(fields))
    odd = tmp_path / "odd.arpa"
    odd.write_text("\n".join(out) + "\n")
    with open(odd, "rb") as fh:
        fast, meta = arpa_fast.read_fast(fh)
    exact, exact_meta = arpa.read_exact(odd)
    assert (_native_bytes(fast, meta, tmp_path / "a.lm")
            == _native_bytes(exact.compact(), exact_meta, tmp_path / "b.lm"))


def test_number_format_of_every_decade_and_sign() -> None:
    # Python's '%.10g' (C printf semantics) is the reference: values of both signs in
    # every decade the fast path writes (1e-4 to 1e10), powers of ten and their neighbours
    rng = np.random.default_rng(5)
    decades = np.repeat(np.arange(-5, 11), 400)
    mags = 10.0 ** (decades + rng.uniform(0, 1, len(decades)))
    powers = 10.0 ** np.arange(-5, 11)
    near = np.concatenate([powers, np.nextafter(powers, 0), np.nextafter(powers, np.inf)])
    log10 = np.concatenate([mags, -mags, near, -near, [99.0, -99.0, 0.5, -0.5]])
    values = log10 * LN10
    chars, lengths = arpa.format_numbers(values)
    got = [bytes(chars[i, :lengths[i]]).decode() for i in range(len(values))]
    assert got == arpa_text.fmt(values)
