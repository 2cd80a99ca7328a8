"""Progress reporting from library code, without printing.

Long library steps accept an optional reporter, a function called as
``report(stage, done, total)``: ``stage`` names the step ("counting n-grams"), ``done`` is
the units finished so far and ``total`` the units the step has (``None`` when unknown).
A new stage starts again from zero. Only :mod:`rescore.cli` renders them (as progress
bars); library code calls them and nothing else.
"""

from __future__ import annotations

from collections.abc import Callable

Report = Callable[[str, int, int | None], None]
Advance = Callable[[int], None]


class Steps:
    """Units of one stage: calling it with ``n`` reports ``n`` more units done."""

    def __init__(self, report: Report | None, stage: str, total: int | None) -> None:
        self.report = report
        self.stage = stage
        self.total = total
        self.done = 0
        if report is not None:
            report(stage, 0, total)

    def __call__(self, n: int = 1) -> None:
        self.done += n
        if self.report is not None:
            done = self.done if self.total is None else min(self.done, self.total)
            self.report(self.stage, done, self.total)

    def spread(self, units: int, parts: int) -> Advance:
        """An advance for ``parts`` calls that adds up to ``units`` of this stage."""
        state = {"calls": 0}

        def advance(n: int = 1) -> None:
            before = state["calls"]
            state["calls"] = after = min(before + n, parts)
            self(units * after // max(parts, 1) - units * before // max(parts, 1))

        return advance

    def finish(self) -> None:
        """Mark the stage complete (when the work took fewer units than announced)."""
        if self.total is not None and self.done < self.total:
            self(self.total - self.done)
