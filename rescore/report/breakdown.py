"""Where the errors are: frequent confusions, changed utterances, WER by metadata value."""

from __future__ import annotations

import json
from collections import Counter
from collections.abc import Mapping, Sequence
from dataclasses import dataclass
from typing import Any

from rescore.report.rows import UtteranceRow
from rescore.wer import Alignment

TOP = 30
CHANGED = 10
MAX_GROUPS = 50
# common practice, not law: below this many utterances a subgroup's WER moves too much with
# one utterance to compare groups or systems on it
MIN_GROUP_UTTERANCES = 30


KINDS = ("substitution", "deletion", "insertion")
# steps the scoring rules count as correct (rescore.align): no errors, but listed apart so
# a reader sees how much the rules forgave
RULE_KINDS = ("equivalent", "optional")


@dataclass(frozen=True)
class Confusion:
    """One kind of error, counted in both systems: a reference word taken for a hypothesis
    word (substitution), a reference word missed (deletion, ``hypothesis`` empty) or a word
    put in (insertion, ``reference`` empty)."""

    kind: str
    reference: str
    hypothesis: str
    before: int
    after: int

    @property
    def change(self) -> int:
        """After minus before (negative: the error became rarer)."""
        return self.after - self.before

    def to_dict(self) -> dict[str, Any]:
        return {"kind": self.kind, "reference": self.reference, "hypothesis": self.hypothesis,
                "before": self.before, "after": self.after, "change": self.change}


@dataclass(frozen=True)
class GroupRow:
    value: str
    utterances: int
    reference_words: int
    before_errors: int
    after_errors: int

    @property
    def before_wer(self) -> float | None:
        return self.before_errors / self.reference_words if self.reference_words else None

    @property
    def after_wer(self) -> float | None:
        return self.after_errors / self.reference_words if self.reference_words else None

    @property
    def too_small(self) -> bool:
        """Fewer utterances than :data:`MIN_GROUP_UTTERANCES`: too few to compare."""
        return self.utterances < MIN_GROUP_UTTERANCES

    def to_dict(self) -> dict[str, Any]:
        return {"value": self.value, "utterances": self.utterances,
                "reference_words": self.reference_words,
                "before_errors": self.before_errors, "after_errors": self.after_errors,
                "before_wer": self.before_wer, "after_wer": self.after_wer,
                "too_small": self.too_small}


@dataclass(frozen=True)
class SkippedKey:
    """A metadata key with no WER breakdown, and why (``values``: its distinct values)."""

    key: str
    values: int
    reason: str

    def to_dict(self) -> dict[str, Any]:
        return {"key": self.key, "values": self.values, "reason": self.reason}


@dataclass(frozen=True)
class Breakdown:
    confusions: tuple[Confusion, ...]
    improved: tuple[str, ...]
    worsened: tuple[str, ...]
    by_meta: Mapping[str, tuple[GroupRow, ...]]
    meta_skipped: tuple[SkippedKey, ...] = ()
    # what the scoring rules counted as correct (kinds RULE_KINDS; an optional word left
    # out has an empty hypothesis), counted in both systems; empty without such rules
    rule_matches: tuple[Confusion, ...] = ()

    def to_dict(self) -> dict[str, Any]:
        out = {
            "confusions": [c.to_dict() for c in self.confusions],
            "most_improved": list(self.improved),
            "most_worsened": list(self.worsened),
            "by_meta": {k: [r.to_dict() for r in rows] for k, rows in self.by_meta.items()},
            "by_meta_skipped": [k.to_dict() for k in self.meta_skipped],
        }
        if self.rule_matches:  # only under rules that change the alignment
            out["rule_matches"] = [c.to_dict() for c in self.rule_matches]
        return out


def _count(alignments: Sequence[Alignment]) -> Counter[tuple[str, str, str]]:
    counts: Counter[tuple[str, str, str]] = Counter()
    for al in alignments:
        for op in al.ops:
            if op.kind == "substitute" and op.ref is not None and op.hyp is not None:
                counts[("substitution", op.ref, op.hyp)] += 1
            elif op.kind == "delete" and op.ref is not None:
                counts[("deletion", op.ref, "")] += 1
            elif op.kind == "insert" and op.hyp is not None:
                counts[("insertion", "", op.hyp)] += 1
    return counts


def _count_ruled(alignments: Sequence[Alignment]) -> Counter[tuple[str, str, str]]:
    counts: Counter[tuple[str, str, str]] = Counter()
    for al in alignments:
        for op in al.ops:
            if op.kind in RULE_KINDS and op.ref is not None:
                counts[(op.kind, op.ref, op.hyp or "")] += 1
    return counts


def confusion_table(before: Sequence[Alignment], after: Sequence[Alignment],
                    top: int = TOP) -> tuple[Confusion, ...]:
    """The ``top`` most frequent errors of either system, each counted in both: ranked by
    the larger of its two counts, then by its count before, kind and words."""
    return _ranked(_count(before), _count(after), KINDS, top)


def rule_table(before: Sequence[Alignment], after: Sequence[Alignment],
               top: int = TOP) -> tuple[Confusion, ...]:
    """The ``top`` most frequent steps the scoring rules counted as correct, each counted
    in both systems and ranked as :func:`confusion_table` ranks errors."""
    return _ranked(_count_ruled(before), _count_ruled(after), RULE_KINDS, top)


def _ranked(b: Counter[tuple[str, str, str]], a: Counter[tuple[str, str, str]],
            kinds: tuple[str, ...], top: int) -> tuple[Confusion, ...]:
    keys = sorted(set(b) | set(a), key=lambda k: (-max(b[k], a[k]), -b[k],
                                                 kinds.index(k[0]), k[1], k[2]))
    return tuple(Confusion(*k, before=b[k], after=a[k]) for k in keys[:top])


def _groupable(value: Any) -> bool:
    return isinstance(value, str | int | float | bool)


def by_meta(rows: Sequence[UtteranceRow], max_groups: int = MAX_GROUPS
            ) -> tuple[dict[str, tuple[GroupRow, ...]], tuple[SkippedKey, ...]]:
    """WER per value of each metadata key, and the keys left out with the reason.

    A key is broken down when every utterance that has it holds a scalar and it takes
    between 2 and ``max_groups`` values (more would make the report unreadable);
    utterances without the key form the group "(none)". Every other key is listed as
    skipped, with its number of distinct values.
    """
    keys = sorted({k for r in rows for k in r.meta})
    out: dict[str, tuple[GroupRow, ...]] = {}
    skipped: list[SkippedKey] = []
    for key in keys:
        values = [r.meta.get(key) for r in rows]
        if not all(v is None or _groupable(v) for v in values):
            kinds = len({json.dumps(v, sort_keys=True, default=str) for v in values})
            skipped.append(SkippedKey(key, kinds, "holds lists or objects, not single values"))
            continue
        labels = ["(none)" if v is None else str(v) for v in values]
        distinct = sorted(set(labels))
        if len(distinct) > max_groups:
            skipped.append(SkippedKey(key, len(distinct),
                                      f"{len(distinct)} values, more than {max_groups}"))
            continue
        if len(distinct) < 2:
            skipped.append(SkippedKey(key, 1, "one value for every utterance"))
            continue
        acc: dict[str, list[int]] = {lab: [0, 0, 0, 0] for lab in distinct}
        for lab, r in zip(labels, rows, strict=True):
            a = acc[lab]
            a[0] += 1
            a[1] += r.reference_words
            a[2] += r.before_errors
            a[3] += r.after_errors
        out[key] = tuple(GroupRow(lab, *acc[lab]) for lab in distinct)
    return out, tuple(skipped)


def build_breakdown(rows: Sequence[UtteranceRow], top: int = TOP,
                    changed: int = CHANGED) -> Breakdown:
    improved = sorted((r for r in rows if r.change < 0), key=lambda r: (r.change, r.id))
    worsened = sorted((r for r in rows if r.change > 0), key=lambda r: (-r.change, r.id))
    groups, skipped = by_meta(rows)
    return Breakdown(
        confusions=confusion_table([r.before for r in rows], [r.after for r in rows], top),
        improved=tuple(r.id for r in improved[:changed]),
        worsened=tuple(r.id for r in worsened[:changed]),
        by_meta=groups,
        meta_skipped=skipped,
        rule_matches=rule_table([r.before for r in rows], [r.after for r in rows], top),
    )
