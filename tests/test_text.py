"""Normalisation: the contract's documented default, applied identically everywhere."""

from __future__ import annotations

import unicodedata

import pytest
from hypothesis import given, settings
from hypothesis import strategies as st

from rescore.text import normalise, tokens


@pytest.mark.parametrize(
    ("raw", "expected"),
    [
        # lowercase, punctuation stripped, whitespace collapsed (contract default)
        ("Vent  bay THREE, opened.", "vent bay three opened"),
        # word-internal apostrophes and hyphens survive; edge ones do not
        ("don't re-seed 'row' -two-", "don't re-seed row two"),
        # typographic apostrophe folds to the ASCII one
        ("Priya\u2019s shift", "priya's shift"),
        # symbols (Unicode S*) and digits are kept; "%" is category Po, so it goes
        ("EC 1.8 at 40% for $3 + tax", "ec 1 8 at 40 for $3 + tax"),
        ("", ""),
        ("  ...  ", ""),
    ],
)
def test_normalise_examples(raw: str, expected: str) -> None:
    assert normalise(raw) == expected


def test_normalise_nfc_composes_accents() -> None:
    # "e" + combining acute (NFD) and the precomposed letter are one word after NFC
    # (Unicode Standard Annex 15, canonical composition).
    decomposed = "cafe\u0301"
    assert tokens(decomposed) == tokens("caf\u00e9") == ["caf\u00e9"]


def test_normalise_non_latin_scripts_kept() -> None:
    # Greek and Devanagari letters are not punctuation (Unicode categories L*/M*); the
    # Devanagari danda (U+0964, category Po) is.
    assert tokens("Αντλία ΤΡΙΑ") == ["αντλία", "τρια"]
    assert tokens("पंप बंद\u0964") == ["पंप", "बंद"]


@given(st.text())
def test_normalise_is_idempotent(raw: str) -> None:
    once = normalise(raw)
    assert normalise(once) == once
    assert once == unicodedata.normalize("NFC", once)
    assert "  " not in once and once == once.strip()


@given(st.text(alphabet=st.characters(max_codepoint=127)))
def test_ascii_fast_path_matches_unicode_rule(raw: str) -> None:
    # The same text with one non-ASCII letter appended takes the general path; both paths
    # must agree on the ASCII part (rule: Unicode category P* except ' and -).
    assert tokens(raw + " \u00e9") == [*tokens(raw), "\u00e9"]


@given(st.lists(st.text(alphabet=st.sampled_from("ab c\n\t.'-É\u2019"), max_size=12),
                max_size=8))
def test_tokens_many_equals_tokens_one_by_one(texts: list[str]) -> None:
    # the batch fast path must agree with the per-text rule, newlines inside texts included
    from rescore.text import tokens_many

    assert list(tokens_many(texts)) == [tokens(t) for t in texts]


@settings(max_examples=300)
@given(st.lists(st.text(alphabet=st.sampled_from(list("ab Zy\t\x0b\x0c\r\x1c\x1f  ")),
                        max_size=12), max_size=8))
def test_batch_split_equals_text_by_text(texts: list[str]) -> None:
    # the one-pass split of a plain ASCII batch must give what normalising each text
    # alone gives (Python's str.split: any ASCII whitespace separates words)
    from rescore.text import Words, tokens_many, word_counts

    got = tokens_many(texts)
    want = [tokens(t) for t in texts]
    assert list(got) == want
    assert word_counts(got).tolist() == [len(w) for w in want]
    if isinstance(got, Words) and texts:
        assert got[-1] == want[-1] and got[0:2] == want[0:2]


# --- whole blocks of lines ----------------------------------------------------------------
# Characters that exercise each rule: ASCII letters of both cases, every kind of ASCII white
# space str.split knows, the kept ' and -, ASCII punctuation, the typographic apostrophe,
# non-ASCII punctuation (em dash Pd, guillemet Pi, danda Po), non-ASCII white space (NEL,
# no-break space, line separator), decomposed and precomposed accents (NFC), the Kelvin
# sign and dotted capital I (lowercase to ASCII / to two characters), final sigma, a symbol
# (S*, kept), a digit, a lone combining accent, NUL and another control character (neither
# space nor punctuation).
_EDGE_CHARS = [*"aZ Kk\t\x0b\x0c\r\x1c\x1f'-.,!%#\"",
    "\u2019", "\u2014", "\u00ab", "\u0964", "\x85", "\u00a0", "\u2028", "\u0301", "\u00e9",
    "\u212a", "\u0130", "\u03a3", "\u03c3", "$", "7", "\x00", "\x07", "\u00c9",
]
_edge_text = st.lists(st.sampled_from([*_EDGE_CHARS, "e\u0301"]), max_size=16).map("".join)


def _block_tokens(lines: list[str]) -> list[list[str]]:
    from rescore.text import clean_words, normalise_block

    words = clean_words(normalise_block("\n".join(lines).encode("utf-8")))
    assert len(words) == len(lines)
    return list(words)


@settings(max_examples=500)
@given(st.lists(_edge_text, min_size=1, max_size=8))
def test_block_normalisation_equals_line_by_line(lines: list[str]) -> None:
    # the contract's rule is tokens() of each line; a block of lines joined by "\n" must
    # give the same words on every line, whichever path the block takes
    assert _block_tokens(lines) == [tokens(line) for line in lines]


@settings(max_examples=300)
@given(st.lists(st.text(max_size=12), min_size=1, max_size=6))
def test_block_normalisation_on_any_unicode(lines: list[str]) -> None:
    # any code point but surrogates (not UTF-8) and "\n" (which ends a line)
    lines = [line.replace("\n", " ") for line in lines
             if not any(0xD800 <= ord(c) <= 0xDFFF for c in line)] or [""]
    assert _block_tokens(lines) == [tokens(line) for line in lines]


@settings(max_examples=500)
@given(st.lists(st.text(alphabet=st.characters(max_codepoint=127, exclude_characters="\n"),
                        max_size=16), min_size=1, max_size=8))
def test_ascii_block_fast_path_equals_general_path(lines: list[str]) -> None:
    # the byte translation of pure-ASCII blocks against the general per-character rule
    # (NFC, lower, U+2019, Unicode category P* but ' and -, str.split, strip "'-"), forced
    # on the same ASCII text: the same words on every line
    from rescore.text import _clean_ascii, _strip_unicode_punct, _strip_word_edges, clean_words

    def general(line: str) -> list[str]:
        text = unicodedata.normalize("NFC", line).lower().replace("\u2019", "'")
        return [w.strip("'-") for w in _strip_unicode_punct(text).split() if w.strip("'-")]

    fast = clean_words(_strip_word_edges(_clean_ascii("\n".join(lines).encode("ascii"))))
    assert list(fast) == [general(line) for line in lines]


@pytest.mark.parametrize(("raw", "expected"), [
    # strip("'-") of each word: runs at either end go, inner runs stay, all-mark words vanish
    ("'-a-'b-'  -'- x--y", ["a-'b", "x--y"]),
    ("-\n'\n''don't''\nre--seed-", [[], [], ["don't"], ["re--seed"]]),
])
def test_block_word_edges(raw: str, expected: list[str] | list[list[str]]) -> None:
    lines = raw.split("\n")
    got = _block_tokens(lines)
    assert got == (expected if len(lines) > 1 else [expected])
