"""Provenance: what a run read and which settings it used, built in one place.

Every output that records provenance (the weights file, the tuning record, the report)
starts from :func:`header` and records data and model files by their SHA-256.
"""

from __future__ import annotations

from collections.abc import Iterable, Mapping
from pathlib import Path
from typing import Any, Protocol

from rescore.checksum import sha256_file
from rescore.counting import PLAIN, Counting
from rescore.text import NORMALISATION
from rescore.version import __version__
from rescore.weights import read_weights


class HashedModel(Protocol):
    """A model file recorded by path and SHA-256 (``pipeline.NamedModel`` is one)."""

    @property
    def path(self) -> Path: ...

    @property
    def sha256(self) -> str: ...


def header(counting: Counting = PLAIN) -> dict[str, Any]:
    """The package, its version and the text normalisation: every record starts so; then
    the token unit and the scoring rules, when not the default (words, no rules file)."""
    return {"package": "rescore", "version": __version__, "normalisation": NORMALISATION,
            **counting.provenance()}


def data_hashes(paths: Iterable[str | Path]) -> dict[str, str]:
    """The SHA-256 of each data file, by path as given."""
    return {str(p): sha256_file(p) for p in paths}


def run_provenance(*, data: Iterable[Path], models: Mapping[str, HashedModel],
                   extra: Mapping[str, Any] | None = None,
                   counting: Counting = PLAIN) -> dict[str, Any]:
    """A tuning run's provenance: the header, its data and models, then ``extra``."""
    out: dict[str, Any] = header(counting) | {
        "data_sha256": data_hashes(data),
        "models": {name: {"path": str(m.path), "sha256": m.sha256} for name, m in models.items()},
    }
    if extra:
        out.update(extra)
    return out


def weights_provenance(path: str | Path) -> dict[str, Any]:
    """The weights in a weights file, its path and SHA-256, for a report's provenance.

    The file is read with the tuner's strict reader, so a report never records weights
    that ``rescore apply`` would refuse.
    """
    weights = read_weights(path).to_dict()
    return {"file": str(path), "sha256": sha256_file(path), **weights,
            "features": dict(sorted(weights["features"].items()))}
