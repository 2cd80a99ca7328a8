"""The unit of counting: words, or the characters of scripts written without spaces.

The unit alone, apart from the scoring rules that :class:`rescore.counting.Counting`
holds beside it: the language-model commands need nothing more, and the rules bring
the aligner and rapidfuzz with them (about 30 ms of the start of ``rescore lm ...``;
pydantic, which the rules' models also use, typer loads in any case).
"""

from __future__ import annotations

from collections.abc import Sequence
from pathlib import Path
from typing import Any, Literal

from rescore.errors import InputError, ParameterError

Unit = Literal["word", "char"]
UNITS: tuple[Unit, ...] = ("word", "char")
WORD: Unit = "word"
UNIT_KEY = "unit"  # its provenance key (present only when not the default)


def parse_unit(value: str) -> Unit:
    """``word`` or ``char``; anything else is a :class:`ParameterError` naming both."""
    if value not in UNITS:
        raise ParameterError(f"unknown unit {value!r}; expected word or char", field="unit")
    return "char" if value == "char" else WORD


def characters(words: Sequence[str]) -> list[str]:
    """The characters of ``words``, the spaces between them dropped."""
    return [c for w in words for c in w]


# under --unit char a report and a table say CER wherever they would say WER
_CHAR_WORDING = (("WER", "CER"), ("reference words", "reference characters"),
                 ("ref words", "ref chars"), ("words both systems", "characters both systems"))


def in_unit(text: str, unit: str) -> str:
    """``text`` worded for ``unit``: unchanged for words; for ``char``, CER for WER and
    characters for reference words."""
    if unit != "char":
        return text
    for word, char in _CHAR_WORDING:
        text = text.replace(word, char)
    return text


def plural(unit: str) -> str:
    """``words`` or ``characters``, as messages name a unit."""
    return "characters" if unit == "char" else f"{unit}s"


def unit_name(unit: str) -> str:
    """How the report names the error rate of a unit: WER or CER."""
    return "CER" if unit == "char" else "WER"


def unit_provenance(unit: str) -> dict[str, Any]:
    """``{"unit": ...}``, empty for the default (words)."""
    return {} if unit == WORD else {UNIT_KEY: unit}


def check_model_unit(model: object, unit: str, *, path: str | Path) -> None:
    """Refuse a model trained on another token unit than ``unit`` (a character model
    under word scoring, or the reverse); a model that does not say (one read from ARPA
    text) is taken as it is."""
    built = getattr(model, "unit", None)
    if built is not None and built != unit:
        raise InputError(f"the model was built on {plural(built)} (lm build --unit "
                         f"{built}) but this run counts {plural(unit)}; give --unit "
                         f"{built}, or a model built with --unit {unit}", path=path,
                         field=UNIT_KEY)
