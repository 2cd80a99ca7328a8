"""What a report reads: one system's transcripts (an N-best file's 1-best or ``id<TAB>text``
lines) and, for provenance, the weights file that made the after system."""

from __future__ import annotations

from collections.abc import Mapping
from pathlib import Path

from rescore.counting import PLAIN, Counting
from rescore.errors import InputError
from rescore.nbest import DEFAULT_LIMITS, iter_nbest, output_text, read_refs
from rescore.readers import iter_text_lines
from rescore.report.build import Pair
from rescore.text import tokens


def is_nbest_file(path: str | Path) -> bool:
    """True when the first non-blank line is a JSON object (N-best); else a transcript file."""
    for _, line in iter_text_lines(path, DEFAULT_LIMITS.max_line_bytes):
        if line.strip():
            return line.lstrip().startswith("{")
    return False


def load_system(
    path: str | Path,
    *,
    refs: Mapping[str, str] | None = None,
    log_base: float | None = None,
    costs: bool | None = None,
    counting: Counting = PLAIN,
) -> list[Pair]:
    """The pairs of one system, in file order, read as ``counting`` scores them.

    An N-best file gives its 1-best (the hypothesis at ``best``, else the first) with the
    file's references, or ``refs`` in their place, and its ``meta``. A transcript file
    (``id<TAB>text``) needs ``refs`` covering exactly its ids.
    """
    if is_nbest_file(path):
        return [
            Pair.from_text(u["id"], u["reference"], output_text(u),
                           u.get("meta"), counting)
            for _, u in iter_nbest(path, refs=refs, log_base=log_base, costs=costs,
                                   require_references=True)
        ]
    hyps = read_refs(path)
    if refs is None:
        raise InputError("a transcript file needs references (--refs FILE)", path=path)
    missing = [k for k in refs if k not in hyps]
    extra = [k for k in hyps if k not in refs]
    if missing or extra:
        detail = [f"missing ids: {_ids(missing)}"] if missing else []
        detail += [f"ids without a reference: {_ids(extra)}"] if extra else []
        raise InputError(f"{len(refs)} references for {len(hyps)} utterances; "
                         + "; ".join(detail), path=path)
    if not hyps:
        raise InputError("no utterances in the file", path=path)
    return [Pair.from_text(k, refs[k], hyps[k], counting=counting) for k in refs]


def reference_sentences(path: str | Path, *, refs: Mapping[str, str] | None = None,
                        log_base: float | None = None,
                        costs: bool | None = None) -> list[list[str]]:
    """The normalised references of an N-best file (or ``refs`` in their place), in file
    order; utterances without one are left out."""
    return [tokens(u["reference"]) for _, u in iter_nbest(path, refs=refs, log_base=log_base,
                                                          costs=costs)
            if u.get("reference") is not None]


def _ids(ids: list[str], limit: int = 5) -> str:
    return ", ".join(ids[:limit]) + (f" and {len(ids) - limit} more" if len(ids) > limit else "")


