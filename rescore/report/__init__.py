"""Release reports: two systems on the same utterances, compared and written three ways.

``build_report`` computes everything into a frozen :class:`Report`; ``write_report``
renders ``report.json``, ``report.md`` and ``report.html`` in memory first, writes all three
to temporaries and renames them into place only when all three are complete, so a failure
or an interruption leaves no partial set behind.
"""

from __future__ import annotations

from rescore.report.build import (
    DEFAULT_RESAMPLES,
    DEFAULT_SEED,
    Difference,
    Pair,
    Report,
    build_report,
    gate_failures,
    with_gate,
)
from rescore.report.files import ReportFiles, read_tuning_record, recorded_models, report_files
from rescore.report.load import is_nbest_file, load_system
from rescore.report.write import FILES, render_all, write_report

__all__ = [
    "DEFAULT_RESAMPLES",
    "DEFAULT_SEED",
    "FILES",
    "Difference",
    "Pair",
    "Report",
    "ReportFiles",
    "build_report",
    "gate_failures",
    "is_nbest_file",
    "load_system",
    "read_tuning_record",
    "recorded_models",
    "render_all",
    "report_files",
    "with_gate",
    "write_report",
]
