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
