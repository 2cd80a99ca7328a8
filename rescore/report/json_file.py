"""The report as JSON: the contract's keys first, then tests, breakdowns and utterances."""

from __future__ import annotations

import json

from rescore.report.build import Report


def render_json(report: Report) -> str:
    return json.dumps(report.to_dict(), indent=2, ensure_ascii=False, allow_nan=False) + "\n"
