"""One utterance of a report: its before and after alignments, the unit the breakdowns,
the critical-word counts and the HTML table all read."""

from __future__ import annotations

from collections.abc import Mapping
from dataclasses import dataclass
from typing import Any

from rescore.wer import Alignment


@dataclass(frozen=True)
class UtteranceRow:
    id: str
    reference_words: int
    before: Alignment
    after: Alignment
    meta: Mapping[str, Any]

    @property
    def before_errors(self) -> int:
        return self.before.errors

    @property
    def after_errors(self) -> int:
        return self.after.errors

    @property
    def change(self) -> int:
        return self.after.errors - self.before.errors
