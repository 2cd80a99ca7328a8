"""Release reports: two systems on the same utterances, compared and written three ways.

``build_report`` computes everything into a frozen :class:`Report`; ``write_report``
renders ``report.json``, ``report.md`` and ``report.html`` in memory first and only then
writes each file atomically, so a failure leaves no partial folder contents behind.
"""

from __future__ import annotations

from pathlib import Path

from rescore.ioutil import write_text_atomic
from rescore.report.json import render_json
from rescore.report.load import is_nbest_file, load_system
from rescore.report.markdown import render_markdown
from rescore.report.model import (
    DEFAULT_RESAMPLES,
    DEFAULT_SEED,
    Difference,
    Pair,
    Report,
    Surface,
    Tuning,
    build_report,
    gate_failures,
    tuning_from_dict,
    with_gate,
)

FILES = ("report.json", "report.md", "report.html")


def render_all(report: Report) -> dict[str, str]:
    """The three files' contents by name (the HTML plots are drawn here)."""
    from rescore.report.html import render_html  # matplotlib loads only when needed

    return {"report.json": render_json(report), "report.md": render_markdown(report),
            "report.html": render_html(report)}


def write_report(report: Report, out_dir: str | Path) -> list[Path]:
    """Write the three report files into ``out_dir`` (created if missing)."""
    contents = render_all(report)
    folder = Path(out_dir)
    folder.mkdir(parents=True, exist_ok=True)
    written = []
    for name in FILES:
        path = folder / name
        write_text_atomic(path, contents[name])
        written.append(path)
    return written


__all__ = [
    "DEFAULT_RESAMPLES",
    "DEFAULT_SEED",
    "FILES",
    "Difference",
    "Pair",
    "Report",
    "Surface",
    "Tuning",
    "build_report",
    "gate_failures",
    "is_nbest_file",
    "load_system",
    "render_all",
    "tuning_from_dict",
    "with_gate",
    "write_report",
]
