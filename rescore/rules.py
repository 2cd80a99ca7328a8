"""Scoring rules: the TOML file a team agrees on, validated, with its checksum and name.

A rules file (read with the standard library's ``tomllib``)::

    name = "ops-desk-v2"                      # optional; default: the file's stem
    normalise = ["nfc", "lowercase", "apostrophe", "punctuation"]   # the default steps
    keep_punctuation = ["%"]                  # marks the punctuation step leaves alone
    equivalent = [["ok", "okay"], ["all right", "alright"], ["fifteen", "15"]]
    optional = ["uh", "um"]                   # absent from the hypothesis = no deletion
    ignore = ["[noise]", "<sil>"]             # tokens removed from both sides

Every key is optional; a file with none is the plain rule of :mod:`rescore.text`. The
spellings in ``equivalent`` and ``optional`` are normalised with the file's own steps, so
``"OK"`` and ``"ok"`` are the same entry. ``ignore`` entries are matched verbatim against
the whitespace-separated tokens of the raw text (so ``[noise]`` goes before punctuation
stripping could turn it into the word ``noise``) and against the normalised tokens.
The scoring itself lives in :mod:`rescore.align`.
"""

from __future__ import annotations

import hashlib
import re
import tomllib
import unicodedata
from collections.abc import Sequence
from dataclasses import dataclass
from pathlib import Path
from typing import Annotated, Any, Literal

from pydantic import (
    AfterValidator,
    BaseModel,
    ConfigDict,
    Field,
    ValidationError,
    field_validator,
    model_validator,
)

from rescore.errors import InputError
from rescore.spool import local

Step = Literal["nfc", "nfkc", "lowercase", "apostrophe", "punctuation"]
STEPS: tuple[Step, ...] = ("nfc", "nfkc", "lowercase", "apostrophe", "punctuation")
# the order and the steps of rescore.text.tokens (NORMALISATION "nfc-lower-strip-punct-v1")
DEFAULT_STEPS: tuple[Step, ...] = ("nfc", "lowercase", "apostrophe", "punctuation")
_KEEP_INSIDE = "'-"  # kept inside a word, stripped at its ends, as in rescore.text


def normalise_words(text: str, steps: Sequence[Step] = DEFAULT_STEPS,
                    keep_punctuation: Sequence[str] = ()) -> list[str]:
    """The words of ``text`` after the named normalisation steps, applied in the order given.

    ``nfc``: Unicode NFC. ``nfkc``: Unicode NFKC, which also folds compatibility forms
    (full-width ``ＯＫ`` to ``OK``, half-width katakana to full-width, the ligature ``ﬁ`` to
    ``fi``); not a default step. ``lowercase``: ``str.lower``. ``apostrophe``: U+2019 becomes
    ``'``. ``punctuation``: every punctuation character (category P*) becomes a space, except
    the marks in ``keep_punctuation`` and ``'`` and ``-``, which survive inside a word only.
    With the default steps the result is :func:`rescore.text.tokens`'s.
    """
    for step in steps:
        if step == "nfc":
            text = unicodedata.normalize("NFC", text)
        elif step == "nfkc":
            text = unicodedata.normalize("NFKC", text)
        elif step == "lowercase":
            text = text.lower()
        elif step == "apostrophe":
            text = text.replace("\u2019", "'")
        else:
            keep = set(keep_punctuation) | set(_KEEP_INSIDE)
            text = "".join(" " if ch not in keep and unicodedata.category(ch).startswith("P")
                           else ch for ch in text)
    if "punctuation" not in steps:
        return text.split()
    strip = "".join(c for c in _KEEP_INSIDE if c not in keep_punctuation)
    return [w for w in (word.strip(strip) for word in text.split()) if w]


def _one_token(entry: str) -> str:
    if not entry or len(entry.split()) != 1:
        raise ValueError(f"{entry!r} must be one token (no spaces)")
    return entry


def _one_mark(mark: str) -> str:
    if len(mark) != 1 or not unicodedata.category(mark).startswith("P"):
        raise ValueError(f"{mark!r} is not one punctuation character")
    return mark


def _group(group: tuple[str, ...]) -> tuple[str, ...]:
    if len(group) < 2:
        raise ValueError(f"{list(group)} needs at least two spellings")
    if any(not spelling.split() for spelling in group):
        raise ValueError("a spelling is empty")
    return group


Token = Annotated[str, AfterValidator(_one_token)]
Mark = Annotated[str, AfterValidator(_one_mark)]
Group = Annotated[tuple[str, ...], AfterValidator(_group)]


class ScoringRules(BaseModel):
    """The scoring rules of one file (all keys optional; see the module docstring)."""

    model_config = ConfigDict(extra="forbid", frozen=True)

    name: str | None = Field(default=None, min_length=1, max_length=64)
    normalise: tuple[Step, ...] = DEFAULT_STEPS
    keep_punctuation: tuple[Mark, ...] = ()
    equivalent: tuple[Group, ...] = ()
    optional: tuple[Token, ...] = ()
    ignore: tuple[Token, ...] = ()

    @field_validator("normalise")
    @classmethod
    def _steps_once(cls, steps: tuple[Step, ...]) -> tuple[Step, ...]:
        twice = sorted({s for s in steps if steps.count(s) > 1})
        if twice:
            raise ValueError(f"step listed twice: {', '.join(twice)}")
        return steps

    @model_validator(mode="after")
    def _one_group_per_spelling(self) -> ScoringRules:
        seen: dict[tuple[str, ...], int] = {}
        for k, group in enumerate(self.equivalent):
            for spelling in group:
                words = tuple(self.normalised(spelling))
                if seen.get(words, k) != k:
                    raise ValueError(f"equivalent: {' '.join(words)!r} is in groups "
                                     f"{seen[words]} and {k}; merge them into one")
                seen[words] = k
        return self

    def words(self, text: str) -> list[str]:
        """The scored tokens of ``text``: ignored tokens dropped, then the normalisation."""
        ignored = set(self.ignore)
        kept = " ".join(t for t in text.split() if t not in ignored)
        return [w for w in self.normalised(kept) if w not in ignored]

    def normalised(self, text: str) -> list[str]:
        """``text`` through this file's normalisation steps (no token is dropped)."""
        return normalise_words(text, self.normalise, self.keep_punctuation)

    @property
    def changes_alignment(self) -> bool:
        """Whether the alignment differs from the plain one (equivalences, optional or
        ignored words); normalisation alone changes the tokens, not how they align."""
        return bool(self.equivalent or self.optional or self.ignore)

    @property
    def plain_normalisation(self) -> bool:
        return self.normalise == DEFAULT_STEPS and not self.keep_punctuation


@dataclass(frozen=True)
class RulesFile:
    """Rules read from a file, with what a provenance record needs to tell them apart."""

    rules: ScoringRules
    name: str
    sha256: str
    path: str

    def provenance(self) -> dict[str, str]:
        return {"name": self.name, "sha256": self.sha256, "path": self.path}


def parse_rules(data: bytes, path: str | Path = "<rules>") -> RulesFile:
    """Validate the bytes of a rules file; errors name ``path``, the line and the key."""
    try:
        text = data.decode("utf-8")
    except UnicodeDecodeError as exc:
        raise InputError(f"not UTF-8 text (byte {exc.start})", path=path) from None
    try:
        table = tomllib.loads(text)
    except tomllib.TOMLDecodeError as exc:
        found = re.search(r"\(at line (\d+), column \d+\)", str(exc))
        line = int(found.group(1)) if found else None
        if line is None and "(at end of document)" in str(exc):
            line = max(1, len(text.splitlines()))
        message = re.sub(r"\s*\(at (line \d+, column \d+|end of document)\)", "",
                         str(exc))
        raise InputError(f"not valid TOML: {message}", path=path, field="toml",
                         line=line) from None
    try:
        rules = ScoringRules.model_validate(table)
    except ValidationError as exc:
        field, message, key = _first_error(exc)
        raise InputError(message, path=path, field=field, line=_key_line(text, key)) from None
    stem = Path(str(path)).name.split(".")[0] or "rules"
    return RulesFile(rules=rules, name=rules.name or stem,
                     sha256=hashlib.sha256(data).hexdigest(), path=str(path))


def load_rules(path: str | Path) -> RulesFile:
    """Read and validate a scoring-rules file (TOML)."""
    try:
        data = local(path).read_bytes()
    except OSError as exc:
        raise InputError(f"cannot read the rules file: {exc.strerror}", path=path) from None
    return parse_rules(data, path)


def _first_error(exc: ValidationError) -> tuple[str, str, str]:
    """(field as ``equivalent[2][0]``, message, top-level key) of the first error."""
    errors = exc.errors(include_url=False)
    extra = [e for e in errors if e["type"] == "extra_forbidden"]
    first: Any = extra[0] if extra else errors[0]
    loc = tuple(first["loc"])
    key = str(loc[0]) if loc else ""
    field = key + "".join(f"[{p}]" for p in loc[1:] if isinstance(p, int))
    msg = str(first["msg"]).removeprefix("Value error, ")
    if first["type"] == "extra_forbidden":
        msg = ("unknown key; expected one of name, normalise, keep_punctuation, "
               "equivalent, optional, ignore")
    elif not loc and re.match(r"^\w+: ", msg):  # a check across entries names its key
        key, msg = msg.split(": ", 1)
        field = key
    elif first["type"] == "literal_error":
        msg = f"unknown step {first['input']!r}; expected one of {', '.join(STEPS)}"
    return field or "rules", msg, key


def _key_line(text: str, key: str) -> int | None:
    """The line where a top-level ``key = ...`` is set (None when not found)."""
    if not key:
        return None
    pattern = re.compile(rf"^\s*{re.escape(key)}\s*=")
    for number, line in enumerate(text.splitlines(), 1):
        if pattern.match(line):
            return number
    return None
