"""The N-best file: strict models, a streaming reader and an atomic writer.

One utterance per line of JSON Lines (plain or gzip). Records are validated whole by one
compiled pydantic TypeAdapter into plain dicts (much faster than a model object per
hypothesis); cross-field rules are checked after. The reader yields utterance by utterance,
so a file larger than memory can be processed in bounded batches.
"""

from __future__ import annotations

import hashlib
import json
import math
from collections.abc import Generator, Iterable, Iterator, Mapping
from dataclasses import dataclass, field
from pathlib import Path
from typing import Annotated, Any, NotRequired

import numpy as np
import orjson
from pydantic import ConfigDict, Field, TypeAdapter, ValidationError, with_config
from typing_extensions import TypedDict

from rescore.errors import InputError
from rescore.outputs import atomic_output
from rescore.readers import count_keys, duplicate_key, iter_text_lines
from rescore.text import tokens

FiniteFloat = Annotated[float, Field(allow_inf_nan=False)]


@with_config(ConfigDict(extra="forbid", strict=True))
class Hypothesis(TypedDict):
    text: str
    acoustic: FiniteFloat
    features: NotRequired[dict[str, FiniteFloat]]
    # Added by `rescore apply`; accepted on input so that rescored files can be read back.
    lm: NotRequired[FiniteFloat]
    word_count: NotRequired[Annotated[int, Field(ge=0)]]
    words: NotRequired[Annotated[int, Field(ge=0)]]  # word_count's name in earlier releases
    total: NotRequired[FiniteFloat]


@with_config(ConfigDict(extra="forbid", strict=True))
class Utterance(TypedDict):
    id: Annotated[str, Field(min_length=1)]
    hypotheses: Annotated[list[Hypothesis], Field(min_length=1)]
    reference: NotRequired[str]
    meta: NotRequired[dict[str, Any]]
    best: NotRequired[Annotated[int, Field(ge=0)]]
    # written by apply --choose (rescore.decode.apply_rule)
    chosen: NotRequired[str]
    word_confidences: NotRequired[list[tuple[str, Annotated[float, Field(ge=0, le=1)]]]]
    word_posteriors: NotRequired[list[tuple[str, Annotated[float, Field(ge=0, le=1)]]]]


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
    max_words: int = 2_000  # per hypothesis, counted as normalisation splits the text
    max_chars: int = 100_000  # per id, reference and hypothesis text


DEFAULT_LIMITS = ReadLimits()


@dataclass(frozen=True)
class ScoreConvention:
    """How the file's scores are expressed; converted to natural-log likelihoods on read."""

    log_base: float | None = None
    scores_are_costs: bool = False

    @property
    def factor(self) -> float:
        scale = 1.0 if self.log_base is None else math.log(self.log_base)
        return -scale if self.scores_are_costs else scale


NATURAL_LOG = ScoreConvention()


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


@dataclass
class RecordParser:
    """Validates one line into an utterance: the per-record rules, with no memory of others.

    Workers of a parallel run each hold one; what needs the whole file (duplicate ids,
    consistent references, reference coverage) is the :class:`IdLedger`'s job.
    """

    path: str
    convention: ScoreConvention = NATURAL_LOG
    refs: Mapping[str, str] | None = None
    require_references: bool = False
    limits: ReadLimits = DEFAULT_LIMITS

    def parse(self, number: int, line: str) -> Utterance:
        path = self.path
        if line.lstrip().startswith('{"nbest_header"'):
            raise InputError("the header may only be the first line", path=path, line=number,
                             field="nbest_header")
        try:
            utt = _UTTERANCE.validate_json(line)
        except ValidationError as exc:
            field, msg = validation_message(exc)
            raise InputError(msg, path=path, line=number, field=field) from None
        twice = duplicate_key(line, _record_keys(utt))
        if twice is not None:
            raise InputError(f"key {twice!r} appears twice in one object (which one counts "
                             "would be a guess)", path=path, line=number, field=twice)
        _check_record(path, number, utt, self.limits)
        if self.refs is not None:
            key = utt["id"]
            if key not in self.refs:
                raise InputError(f"no reference for id {key!r} in the references file",
                                 path=path, line=number, field="id")
            utt["reference"] = self.refs[key]
        if self.require_references and "reference" not in utt:
            raise InputError("reference needed (in the file or with --refs)",
                             path=path, line=number, field="reference")
        if self.convention.factor != 1.0:
            _convert(path, number, utt, self.convention.factor)
        return utt


# ids admitted one at a time wait as Python ints (about 100 bytes an utterance) until this
# many are moved into numpy: a few hundred KB at most (65,536 held 6.5 MB, which showed as
# growth in the peak of apply from 10,000 to 100,000 utterances)
_LEDGER_RUN = 4096


@dataclass
class IdLedger:
    """The whole-file rules: unique ids, references on all or none, refs file covered.

    Ids are kept as 64-bit BLAKE2b digests in numpy arrays (16 bytes an utterance with the
    line number), so a million-utterance file costs about 16 MB, not a dict of strings.
    Duplicates are found when the file ends, by sorting; the error names both lines. (Two
    different ids share a digest with probability about n^2 / 2^65: 3e-8 for a million.)
    """

    path: str
    refs: Mapping[str, str] | None = None
    has_refs: bool | None = None
    count: int = 0
    _digests: list[int] = field(default_factory=list)
    _lines: list[int] = field(default_factory=list)
    _chunks: list[tuple[np.ndarray, np.ndarray]] = field(default_factory=list)

    def admit(self, number: int, key: str, has_reference: bool) -> None:
        self._digests.append(id_digest(key))
        self._lines.append(number)
        self.count += 1
        if len(self._digests) >= _LEDGER_RUN:
            self._flush()
        if self.has_refs is None:
            self.has_refs = has_reference
        elif has_reference != self.has_refs:
            which = "has no reference although earlier utterances have" if self.has_refs \
                else "has a reference although earlier utterances have none"
            raise InputError(which, path=self.path, line=number, field="reference")

    def admit_many(self, lines: np.ndarray, digests: np.ndarray, has_reference: np.ndarray
                   ) -> None:
        """Admit a run of records at once, as :func:`id_digest` values (a parallel worker's
        shard, in file order)."""
        if not len(lines):
            return
        self._flush()
        if self.has_refs is None:
            self.has_refs = bool(has_reference[0])
        odd = np.flatnonzero(has_reference != self.has_refs)
        if odd.size:
            which = "has no reference although earlier utterances have" if self.has_refs \
                else "has a reference although earlier utterances have none"
            raise InputError(which, path=self.path, line=int(lines[odd[0]]), field="reference")
        self._chunks.append((np.asarray(digests, dtype=np.int64),
                             np.asarray(lines, dtype=np.int64)))
        self.count += len(lines)

    def _flush(self) -> None:
        if self._digests:
            self._chunks.append((np.array(self._digests, dtype=np.int64),
                                 np.array(self._lines, dtype=np.int64)))
            self._digests, self._lines = [], []

    def finish(self) -> None:
        self._flush()
        if self._chunks:
            digests = np.concatenate([c[0] for c in self._chunks])
            lines = np.concatenate([c[1] for c in self._chunks])
            order = np.argsort(digests, kind="stable")
            same = np.flatnonzero(digests[order][1:] == digests[order][:-1])
            if len(same):
                pairs = np.sort(np.stack([lines[order][same], lines[order][same + 1]]), axis=0)
                later = int(pairs[1].min())
                first = int(pairs[0][pairs[1] == later][0])
                key = _id_on_line(self.path, later)
                raise InputError(f"duplicate id {key!r} (first on line {first})",
                                 path=self.path, line=later, field="id")
        if self.refs is not None and len(self.refs) != self.count:
            missing = sorted(set(self.refs) - self._ids())
            shown = ", ".join(missing[:5]) + (" ..." if len(missing) > 5 else "")
            raise InputError(f"{len(self.refs)} references for {self.count} utterances; "
                             f"ids not in the N-best file: {shown}", path=self.path)

    def _ids(self) -> set[str]:
        # only on the error path: every id in the file is also in refs, so compare digests
        assert self.refs is not None
        seen = set(np.concatenate([c[0] for c in self._chunks]).tolist()) \
            if self._chunks else set()
        return {k for k in self.refs if id_digest(k) in seen}


def id_digest(key: str) -> int:
    """The 64-bit BLAKE2b digest of an id, as :class:`IdLedger` keeps it."""
    digest = hashlib.blake2b(key.encode("utf-8"), digest_size=8).digest()
    return int.from_bytes(digest, "little", signed=True)


def _id_on_line(path: str, number: int) -> str:
    # the file has been read once under its own line cap; this rereads it up to ``number``
    for n, line in iter_text_lines(path, None):
        if n == number:
            value = json.loads(line).get("id", "")
            return str(value)
    return ""


def read_convention(
    path: str | Path, *, log_base: float | None = None, costs: bool | None = None,
    limits: ReadLimits = DEFAULT_LIMITS,
) -> tuple[ScoreConvention, int]:
    """The file's score convention and the line number of its header (0 when it has none)."""
    for number, line in iter_text_lines(path, limits.max_line_bytes):
        if line.strip():
            convention, is_header = _header(path, number, line, log_base, costs)
            return convention, number if is_header else 0
    return _header(path, 0, "", log_base, costs)[0], 0


def iter_nbest(
    path: str | Path,
    *,
    refs: Mapping[str, str] | None = None,
    log_base: float | None = None,
    costs: bool | None = None,
    require_references: bool = False,
    limits: ReadLimits = DEFAULT_LIMITS,
) -> Generator[tuple[int, Utterance], None, None]:
    """Yield ``(line_number, utterance)`` for every record, validated and converted.

    ``refs`` (from ``--refs``) replaces references in the file and must cover exactly the
    file's ids. ``log_base`` and ``costs`` override the header. Acoustic and feature scores
    come out as natural-log likelihoods (higher is better).
    """
    convention, header_line = read_convention(path, log_base=log_base, costs=costs,
                                              limits=limits)
    parser = RecordParser(str(path), convention, refs, require_references, limits)
    ledger = IdLedger(str(path), refs)
    for number, utt in iter_records(path, parser, skip_line=header_line):
        ledger.admit(number, utt["id"], "reference" in utt)
        yield number, utt
    ledger.finish()


def iter_records(path: str | Path, parser: RecordParser, *, skip_line: int = 0,
                 start: int = 0, end: int | None = None, first_line: int = 1
                 ) -> Iterator[tuple[int, Utterance]]:
    """The reader's loop over the lines of ``path`` from byte ``start`` to ``end``: every
    record but blank lines and ``skip_line`` (the header), validated one by one by
    ``parser``. The whole-file rules (:class:`IdLedger`) are the caller's: :func:`iter_nbest`
    keeps them for a whole file, a parallel run for all its shards together."""
    for number, line in iter_text_lines(path, parser.limits.max_line_bytes, start=start,
                                        end=end, first_line=first_line):
        if number == skip_line or not line.strip():
            continue
        yield number, parser.parse(number, line)


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


def _record_keys(utt: Utterance) -> int:
    """The keys of a validated record, counted the fast way for its known shape."""
    hyps = utt["hypotheses"]
    n = len(utt) + sum(map(len, hyps))
    n += sum(len(h["features"]) for h in hyps if "features" in h)
    return n + count_keys(utt["meta"]) if "meta" in utt else n


def _check_record(path: str | Path, number: int, utt: Utterance, limits: ReadLimits) -> None:
    hyps = utt["hypotheses"]
    if len(hyps) > limits.max_hypotheses:
        raise InputError(f"{len(hyps)} hypotheses, more than the limit of {limits.max_hypotheses}",
                         path=path, line=number, field="hypotheses")
    best = utt.get("best")
    if best is not None and best >= len(hyps):
        raise InputError(f"index {best} but only {len(hyps)} hypotheses",
                         path=path, line=number, field="best")
    _check_chars(path, number, "id", utt["id"], limits)
    if "reference" in utt:
        _check_chars(path, number, "reference", utt["reference"], limits)
    # no text longer than both caps: neither can be broken (one word takes one character)
    if max(map(len, [hyp["text"] for hyp in hyps]), default=0) <= min(limits.max_chars,
                                                                      limits.max_words):
        return
    for i, hyp in enumerate(hyps):
        text = hyp["text"]
        _check_chars(path, number, f"hypotheses[{i}].text", text, limits)
        # Words as normalisation splits them (any whitespace, punctuation), not spaces only:
        # each takes at least one character, so only a longer text can break the cap.
        if len(text) > limits.max_words and len(tokens(text)) > limits.max_words:
            raise InputError(f"more than the limit of {limits.max_words} words",
                             path=path, line=number, field=f"hypotheses[{i}].text")


def _check_chars(path: str | Path, number: int, field: str, text: str,
                 limits: ReadLimits) -> None:
    if len(text) > limits.max_chars:
        raise InputError(f"{len(text)} characters, more than the limit of {limits.max_chars}",
                         path=path, line=number, field=field)


def _convert(path: str, number: int, utt: Utterance, factor: float) -> None:
    """Scale the scores to natural-log likelihoods; a score that leaves the range of a float
    on the way (log base 1e300 times -1e307) is refused, naming its line and field."""
    for i, hyp in enumerate(utt["hypotheses"]):
        hyp["acoustic"] = hyp["acoustic"] * factor
        if not math.isfinite(hyp["acoustic"]):
            raise _overflow(path, number, f"hypotheses[{i}].acoustic", factor)
        feats = hyp.get("features")
        if feats:
            hyp["features"] = {k: v * factor for k, v in feats.items()}
            for k, v in hyp["features"].items():
                if not math.isfinite(v):
                    raise _overflow(path, number, f"hypotheses[{i}].features.{k}", factor)


def _overflow(path: str, number: int, field: str, factor: float) -> InputError:
    return InputError(f"score out of range once converted to natural log (times {factor:.6g})",
                      path=path, line=number, field=field)


def one_best(utt: Utterance) -> Hypothesis:
    """The utterance's 1-best: the hypothesis at ``best`` when present, else the first."""
    return utt["hypotheses"][utt.get("best", 0)]


def output_text(utt: Utterance) -> str:
    """The text a rescored record outputs: ``chosen`` when a choice rule wrote it (it may be
    words no single hypothesis holds), else the 1-best's."""
    return utt.get("chosen", one_best(utt)["text"])


def dumps(utt: Utterance) -> str:
    """One compact JSON line (UTF-8 text, floats in their shortest round-trip form)."""
    return orjson.dumps(utt).decode("utf-8")


def write_nbest(path: str | Path, utterances: Iterable[Utterance]) -> int:
    """Write utterances as JSON Lines atomically; returns the number written."""
    count = 0
    with atomic_output(path) as fh:
        for utt in utterances:
            fh.write(dumps(utt) + "\n")
            count += 1
    return count
