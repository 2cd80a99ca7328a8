"""The scoring-rules file: its model, its errors, its checksum and its normalisation steps."""

from __future__ import annotations

import hashlib
from pathlib import Path

import pytest
from hypothesis import given
from hypothesis import strategies as st

from rescore.align import CompiledRules
from rescore.errors import InputError
from rescore.rules import DEFAULT_STEPS, load_rules, normalise_words, parse_rules
from rescore.text import tokens

FULL = b"""\
name = "ops-desk"
normalise = ["nfc", "lowercase", "apostrophe", "punctuation"]
keep_punctuation = ["%"]
equivalent = [["OK", "okay"], ["all right", "alright"]]
optional = ["uh", "um"]
ignore = ["[noise]"]
"""


def error_of(data: bytes, name: str = "team.toml") -> str:
    with pytest.raises(InputError) as caught:
        parse_rules(data, name)
    return str(caught.value)


def test_full_file_is_read(tmp_path: Path) -> None:
    path = tmp_path / "desk.rules.toml"
    path.write_bytes(FULL)
    loaded = load_rules(path)
    assert loaded.name == "ops-desk"
    # source: hashlib's SHA-256 of the file's bytes, the checksum a team can recompute
    assert loaded.sha256 == hashlib.sha256(FULL).hexdigest()
    assert loaded.rules.equivalent == (("OK", "okay"), ("all right", "alright"))
    assert loaded.rules.changes_alignment
    assert loaded.provenance() == {"name": "ops-desk", "sha256": loaded.sha256,
                                   "path": str(path)}


def test_name_defaults_to_the_file_stem() -> None:
    assert parse_rules(b"optional = ['um']\n", "dir/desk.rules.toml").name == "desk"


def test_empty_file_is_the_plain_rule() -> None:
    rules = parse_rules(b"", "empty.toml").rules
    assert not rules.changes_alignment and rules.plain_normalisation
    assert rules.normalise == DEFAULT_STEPS


@pytest.mark.parametrize(("data", "expected"), [
    # TOML syntax: tomllib's line, our file name
    (b"optional = ['um'\n", "team.toml:1: toml: not valid TOML: Unclosed array"),
    (b"name = 'a'\nname = 'b'\n", "team.toml:2: toml: not valid TOML: Cannot overwrite"),
    # a typo of a key: named, with the line where it is set
    (b"# rules\noptinal = ['um']\n", "team.toml:2: optinal: unknown key; expected one of"),
    # a group of one spelling cannot make anything equivalent
    (b"equivalent = [['ok', 'okay'], ['alright']]\n",
     "team.toml:1: equivalent[1]: ['alright'] needs at least two spellings"),
    (b"\n\nnormalise = ['nfc', 'casefold']\n",
     "team.toml:3: normalise[1]: unknown step 'casefold'; expected one of nfc, nfkc, lowercase"),
    (b"optional = ['uh huh']\n", "team.toml:1: optional[0]: 'uh huh' must be one token"),
    (b"keep_punctuation = ['ab']\n",
     "team.toml:1: keep_punctuation[0]: 'ab' is not one punctuation character"),
    # "OK" and "ok" are one spelling after lowercasing: two groups would be ambiguous
    (b"equivalent = [['ok', 'okay'], ['OK', 'k']]\n",
     "team.toml:1: equivalent: 'ok' is in groups 0 and 1; merge them into one"),
    (b"ignore = 'noise'\n", "team.toml:1: ignore: Input should be a valid tuple"),
])
def test_errors_name_file_line_and_key(data: bytes, expected: str) -> None:
    assert error_of(data).startswith(expected)


def test_missing_file_is_an_input_error(tmp_path: Path) -> None:
    with pytest.raises(InputError, match="cannot read the rules file"):
        load_rules(tmp_path / "absent.toml")


@given(st.text(alphabet=st.characters(codec="utf-8"), max_size=40))
def test_default_steps_are_the_default_normalisation(text: str) -> None:
    # the named steps, in the default order, are rescore.text's documented normalisation
    assert normalise_words(text) == tokens(text)


def test_steps_can_keep_case_and_a_mark() -> None:
    # without "lowercase" the case stays; a kept mark survives the punctuation step
    assert normalise_words("NASA: 40% up", ["nfc", "punctuation"], ["%"]) == \
        ["NASA", "40%", "up"]
    assert normalise_words("NASA: 40% up") == ["nasa", "40", "up"]


def test_rule_spellings_use_the_files_steps() -> None:
    # "OK" in the file is "ok" after lowercase, so it matches the normalised word
    compiled = CompiledRules.of(parse_rules(FULL).rules)
    assert compiled.phrases[("ok",)] == compiled.phrases[("okay",)]
    assert compiled.phrases[("all", "right")] == compiled.phrases[("alright",)]
