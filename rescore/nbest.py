"""The N-best file: strict models, a streaming reader and an atomic writer.

One utterance per line of JSON Lines (plain or gzip). Records are validated whole by one
compiled pydantic TypeAdapter into plain dicts (much faster than a model object per
hypothesis); cross-field rules are checked after. The reader yields utterance by utterance,
so a file larger than memory can be processed in bounded batches.
"""

from __future__ import annotations

import json
import math
from collections.abc import Iterable, Iterator, Mapping
from dataclasses import dataclass
from pathlib import Path
from typing import Annotated, Any

from typing_extensions import NotRequired, TypedDict

from pydantic import ConfigDict, Field, TypeAdapter, ValidationError, with_config

from rescore.errors import InputError
from rescore.ioutil import atomic_output, iter_text_lines

FiniteFloat = Annotated[float, Field(allow_inf_nan=False)]


@with_config(ConfigDict(extra="forbid", strict=True))
class Hypothesis(TypedDict):
    text: str
    acoustic: FiniteFloat
    features: NotRequired[dict[str, FiniteFloat]]
    # Added by `rescore apply`; accepted on input so that rescored files can be read back.
    lm: NotRequired[FiniteFloat]
    words: NotRequired[Annotated[int, Field(ge=0)]]
    total: NotRequired[FiniteFloat]


@with_config(ConfigDict(extra="forbid", strict=True))
class Utterance(TypedDict):
    id: Annotated[str, Field(min_length=1)]
    hypotheses: Annotated[list[Hypothesis], Field(min_length=1)]
    reference: NotRequired[str]
    meta: NotRequired[dict[str, Any]]
    best: NotRequired[Annotated[int, Field(ge=0)]]


@with_config(ConfigDict(extra="forbid", strict=True))
class HeaderFields(TypedDict):
    log_base: NotRequired[Annotated[float, Field(gt=0, allow_inf_nan=False)]]
    scores_are_costs: NotRequired[bool]


@with_config(ConfigDict(extra="forbid", strict=True))
class Header(TypedDict):
    nbest_header: HeaderFields


_UTTERANCE = TypeAdapter(Utterance)
_HEADER = TypeAdapter(Header)


@dataclass(frozen=True)
class ReadLimits:
    """Caps on hostile or broken input; each breach is a one-line error."""

    max_line_bytes: int = 64 * 1024 * 1024
    max_hypotheses: int = 10_000
    max_words: int = 2_000


@dataclass(frozen=True)
class ScoreConvention:
    """How the file's scores are expressed; converted to natural-log likelihoods on read."""

    log_base: float | None = None
    scores_are_costs: bool = False

    @property
    def factor(self) -> float:
        scale = 1.0 if self.log_base is None else math.log(self.log_base)
        return -scale if self.scores_are_costs else scale


def _loc(loc: tuple[int | str, ...]) -> str:
    out = ""
    for part in loc:
        if isinstance(part, int):
            out += f"[{part}]"
        else:
            out += ("." if out else "") + part
    return out


def validation_message(exc: ValidationError) -> tuple[str, str]:
    """(field, message) of the first error, in the contract's ``hypotheses[3].acoustic`` form."""
    errors = exc.errors(include_url=False)
    # An unknown key usually is a typo of a missing one: name the typo, it is the fix.
    extra = [e for e in errors if e["type"] == "extra_forbidden"]
    first = extra[0] if extra else errors[0]
    if first["type"] == "json_invalid":
        return "json", str(first["msg"])
    field = _loc(tuple(first["loc"])) or "record"
    msg = str(first["msg"])
    if first["type"] == "extra_forbidden":
        msg = "unknown key (not part of the N-best format; check its spelling)"
    elif first["type"] == "missing":
        msg = "required key is missing"
    return field, msg


def read_refs(path: str | Path) -> dict[str, str]:
    """References (or transcripts) from ``id<TAB>text`` lines; blank lines are skipped."""
    refs: dict[str, str] = {}
    first_line: dict[str, int] = {}
    for number, line in iter_text_lines(path):
        if not line.strip():
            continue
        key, tab, text = line.partition("\t")
        if not tab:
            raise InputError("expected 'id<TAB>text' (no tab found)", path=path, line=number)
        key = key.strip()
        if not key:
            raise InputError("empty id", path=path, line=number, field="id")
        if key in refs:
            raise InputError(
                f"duplicate id {key!r} (first on line {first_line[key]})",
                path=path, line=number, field="id",
            )
        refs[key] = text
        first_line[key] = number
    return refs


def iter_nbest(
    path: str | Path,
    *,
    refs: Mapping[str, str] | None = None,
    log_base: float | None = None,
    costs: bool | None = None,
    require_references: bool = False,
    limits: ReadLimits = ReadLimits(),
) -> Iterator[tuple[int, Utterance]]:
    """Yield ``(line_number, utterance)`` for every record, validated and converted.

    ``refs`` (from ``--refs``) replaces references in the file and must cover exactly the
    file's ids. ``log_base`` and ``costs`` override the header. Acoustic and feature scores
    come out as natural-log likelihoods (higher is better).
    """
    seen: dict[str, int] = {}
    has_refs: bool | None = None
    convention: ScoreConvention | None = None
    for number, line in iter_text_lines(path, limits.max_line_bytes):
        if not line.strip():
            continue
        if convention is None:
            convention, is_header = _header(path, number, line, log_base, costs)
            if is_header:
                continue
        elif '"nbest_header"' in line[:40] and line.lstrip().startswith('{"nbest_header"'):
            raise InputError("the header may only be the first line", path=path, line=number,
                             field="nbest_header")
        try:
            utt = _UTTERANCE.validate_json(line)
        except ValidationError as exc:
            field, msg = validation_message(exc)
            raise InputError(msg, path=path, line=number, field=field) from None
        _check_record(path, number, utt, limits)
        key = utt["id"]
        if key in seen:
            raise InputError(f"duplicate id {key!r} (first on line {seen[key]})",
                             path=path, line=number, field="id")
        seen[key] = number
        if refs is not None:
            if key not in refs:
                raise InputError(f"no reference for id {key!r} in the references file",
                                 path=path, line=number, field="id")
            utt["reference"] = refs[key]
        present = "reference" in utt
        if has_refs is None:
            has_refs = present
        elif present != has_refs:
            which = "has no reference although earlier utterances have" if has_refs else \
                "has a reference although earlier utterances have none"
            raise InputError(which, path=path, line=number, field="reference")
        if require_references and not present:
            raise InputError("reference needed (in the file or with --refs)",
                             path=path, line=number, field="reference")
        if convention.factor != 1.0:
            _convert(utt, convention.factor)
        yield number, utt
    if refs is not None and len(refs) != len(seen):
        missing = sorted(set(refs) - set(seen))
        shown = ", ".join(missing[:5]) + (" ..." if len(missing) > 5 else "")
        raise InputError(f"{len(refs)} references for {len(seen)} utterances; "
                         f"ids not in the N-best file: {shown}", path=path)


def read_nbest(path: str | Path, **options: Any) -> Iterator[Utterance]:
    """Yield the utterances of an N-best file (see :func:`iter_nbest` for the options)."""
    for _, utt in iter_nbest(path, **options):
        yield utt


def _header(
    path: str | Path, number: int, line: str, log_base: float | None, costs: bool | None
) -> tuple[ScoreConvention, bool]:
    stripped = line.lstrip()
    is_header = stripped.startswith('{"nbest_header"')
    fields: HeaderFields = {}
    if is_header:
        try:
            fields = _HEADER.validate_json(line)["nbest_header"]
        except ValidationError as exc:
            field, msg = validation_message(exc)
            raise InputError(msg, path=path, line=number, field=field) from None
        if fields.get("log_base") == 1.0:
            raise InputError("log base 1 is not a logarithm", path=path, line=number,
                             field="nbest_header.log_base")
    base = log_base if log_base is not None else fields.get("log_base")
    is_cost = costs if costs is not None else fields.get("scores_are_costs", False)
    return ScoreConvention(base, is_cost), is_header


def _check_record(path: str | Path, number: int, utt: Utterance, limits: ReadLimits) -> None:
    hyps = utt["hypotheses"]
    if len(hyps) > limits.max_hypotheses:
        raise InputError(f"{len(hyps)} hypotheses, more than the limit of {limits.max_hypotheses}",
                         path=path, line=number, field="hypotheses")
    best = utt.get("best")
    if best is not None and best >= len(hyps):
        raise InputError(f"index {best} but only {len(hyps)} hypotheses",
                         path=path, line=number, field="best")
    for i, hyp in enumerate(hyps):
        if hyp["text"].count(" ") >= limits.max_words and len(hyp["text"].split()) > limits.max_words:
            raise InputError(f"more than the limit of {limits.max_words} words",
                             path=path, line=number, field=f"hypotheses[{i}].text")


def _convert(utt: Utterance, factor: float) -> None:
    for hyp in utt["hypotheses"]:
        hyp["acoustic"] = hyp["acoustic"] * factor
        feats = hyp.get("features")
        if feats:
            hyp["features"] = {k: v * factor for k, v in feats.items()}


def one_best(utt: Utterance) -> Hypothesis:
    """The utterance's 1-best: the hypothesis at ``best`` when present, else the first."""
    return utt["hypotheses"][utt.get("best", 0)]


def dumps(utt: Utterance) -> str:
    return json.dumps(utt, ensure_ascii=False, allow_nan=False)


def write_nbest(path: str | Path, utterances: Iterable[Utterance]) -> int:
    """Write utterances as JSON Lines atomically; returns the number written."""
    count = 0
    with atomic_output(path) as fh:
        for utt in utterances:
            fh.write(dumps(utt) + "\n")  # type: ignore[arg-type]
            count += 1
    return count
