"""The three report files, rendered in memory and written as a set."""

from __future__ import annotations

import contextlib
from pathlib import Path

from rescore.errors import InputError
from rescore.outputs import write_texts_atomic
from rescore.report.build import Report
from rescore.report.json_file import render_json
from rescore.report.markdown import render_markdown

FILES = ("report.json", "report.md", "report.html")


def render_all(report: Report) -> dict[str, str]:
    """The three files' contents by name (the HTML plots are drawn here)."""
    from rescore.report.html import render_html  # matplotlib loads only when needed

    return {"report.json": render_json(report), "report.md": render_markdown(report),
            "report.html": render_html(report)}


def write_report(report: Report, out_dir: str | Path) -> list[Path]:
    """Write the three report files into ``out_dir`` (created if missing), as a set: all
    three are complete on disk before the first is renamed into place."""
    contents = render_all(report)
    folder = Path(out_dir)
    if folder.exists() and not folder.is_dir():
        raise InputError("is a file, expected a folder for the report", path=folder)
    created = not folder.exists()
    try:
        folder.mkdir(parents=True, exist_ok=True)
    except OSError as exc:
        raise InputError(f"cannot create the report folder ({exc.strerror})",
                         path=folder) from None
    written = [folder / name for name in FILES]
    try:
        write_texts_atomic(dict(zip(written, (contents[name] for name in FILES), strict=True)))
    except BaseException:
        if created:  # a folder made for this report goes with it (a full disk, Ctrl-C)
            with contextlib.suppress(OSError):
                folder.rmdir()
        raise
    return written
