"""What a tuning run returns: the tuned weights, the error surface, folds, the depth table and
grid widenings."""

from __future__ import annotations

from collections.abc import Mapping, Sequence
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

import numpy as np

from rescore.errors import InputError
from rescore.weights import ACOUSTIC_SCALE, INSERTION_PENALTY, LM_WEIGHT, Weights

_SIDE_LABELS = {"lm_low": "lowest LM weight", "lm_high": "highest LM weight",
                "penalty_low": "lowest penalty", "penalty_high": "highest penalty"}


@dataclass(frozen=True, eq=False)
class Surface:
    """Corpus errors at every grid point: ``errors[i, j]`` at ``lm[i]``, ``penalty[j]``."""

    lm: np.ndarray
    penalty: np.ndarray
    errors: np.ndarray

    def to_dict(self) -> dict[str, Any]:
        return {LM_WEIGHT: self.lm.tolist(), INSERTION_PENALTY: self.penalty.tolist(),
                "errors": self.errors.tolist()}

    @classmethod
    def from_dict(cls, raw: Any, *, path: str | Path | None = None) -> Surface:
        """The surface as :meth:`to_dict` spells it; a bad one is an :class:`InputError`
        that names the field."""
        try:
            lm = np.array([float(v) for v in raw[LM_WEIGHT]], dtype=np.float64)
            pen = np.array([float(v) for v in raw[INSERTION_PENALTY]], dtype=np.float64)
            rows = [[float(v) for v in row] for row in raw["errors"]]
        except (KeyError, TypeError, ValueError) as exc:
            raise InputError(f"cannot read the error surface ({exc})", path=path,
                             field="surface") from None
        if len(rows) != len(lm) or any(len(r) != len(pen) for r in rows):
            raise InputError(
                f"errors should be {len(lm)} rows of {len(pen)} values (one row per LM weight)",
                path=path, field="surface.errors")
        return cls(lm, pen, np.array(rows, dtype=np.float64).reshape(len(lm), len(pen)))


@dataclass(frozen=True)
class Fold:
    """One held-out fold of the cross-validation."""

    utterances: int
    reference_words: int
    errors: int
    wer: float
    weights: Weights

    def to_dict(self) -> dict[str, Any]:
        return {"utterances": self.utterances, "reference_words": self.reference_words,
                "errors": self.errors, "wer": self.wer, **self.weights.to_dict()}


@dataclass(frozen=True)
class CrossValidation:
    """k-fold cross-validated WER: held-out errors summed over all folds / total words."""

    folds: tuple[Fold, ...]
    errors: int
    reference_words: int
    wer: float
    seed: int

    def to_dict(self) -> dict[str, Any]:
        return {"k": len(self.folds), "seed": self.seed, "errors": self.errors,
                "reference_words": self.reference_words, "wer": self.wer,
                "folds": [f.to_dict() for f in self.folds]}


@dataclass(frozen=True)
class DepthRow:
    """WERs when only the first ``depth`` hypotheses of every list are kept.

    ``tuned_wer`` is at the weights tuned on the full lists (not re-tuned per depth).
    """

    depth: int
    label: str
    one_best_wer: float
    tuned_wer: float
    oracle_wer: float

    def to_dict(self) -> dict[str, Any]:
        return {"depth": self.depth, "label": self.label, "one_best_wer": self.one_best_wer,
                "tuned_wer": self.tuned_wer, "oracle_wer": self.oracle_wer}

    @classmethod
    def from_dict(cls, row: Any, *, path: str | Path | None = None,
                  where: str = "depth") -> DepthRow:
        """A row as :meth:`to_dict` spells it (``label`` defaults to the depth)."""
        if not isinstance(row, Mapping):
            raise InputError("a depth row must be an object", path=path, field=where)
        for key in ("depth", "one_best_wer", "tuned_wer", "oracle_wer"):
            value = row.get(key)
            if isinstance(value, bool) or not isinstance(value, int | float):
                raise InputError(f"expected a number, got {value!r}", path=path,
                                 field=f"{where}.{key}")
        return cls(depth=int(row["depth"]), label=str(row.get("label", row["depth"])),
                   one_best_wer=float(row["one_best_wer"]), tuned_wer=float(row["tuned_wer"]),
                   oracle_wer=float(row["oracle_wer"]))


@dataclass(frozen=True, eq=False)
class TuningRecord:
    """The tuning record: what ``tune --analysis`` writes of a run beside the weights and
    what ``report --tuning`` shows of it (error surface, depth table, chosen weights), one
    schema both ways. Any part may be absent."""

    surface: Surface | None = None
    depth: tuple[DepthRow, ...] = ()
    lm_weight: float | None = None
    insertion_penalty: float | None = None

    def to_dict(self) -> dict[str, Any]:
        """The record's keys as :meth:`TuneResult.to_dict` spells them; absent parts left out."""
        out: dict[str, Any] = {}
        if self.surface is not None:
            out["surface"] = self.surface.to_dict()
        if self.depth:
            out["depth"] = [row.to_dict() for row in self.depth]
        if self.lm_weight is not None:
            out[LM_WEIGHT] = self.lm_weight
        if self.insertion_penalty is not None:
            out[INSERTION_PENALTY] = self.insertion_penalty
        return out

    @classmethod
    def from_dict(cls, data: Mapping[str, Any], *, path: str | Path | None = None
                  ) -> TuningRecord:
        """Read a tuning record (a whole ``tune --analysis`` file is one); absent or null
        parts are skipped, a malformed one is an :class:`InputError` naming its field."""
        raw = data.get("surface")
        surface = None if raw is None else Surface.from_dict(raw, path=path)
        rows = data.get("depth")
        if rows is not None and (isinstance(rows, str | bytes) or not isinstance(rows, Sequence)):
            raise InputError("expected a list of rows", path=path, field="depth")
        depth = tuple(DepthRow.from_dict(row, path=path, where=f"depth[{i}]")
                      for i, row in enumerate(rows or ()))

        def number(key: str) -> float | None:
            v = data.get(key)
            return float(v) if isinstance(v, int | float) and not isinstance(v, bool) else None

        return cls(surface, depth, number(LM_WEIGHT), number(INSERTION_PENALTY))


@dataclass(frozen=True)
class Widening:
    """One widening of the grid: the sides of the grid that the fewest-errors region
    touched (with its error count), and the grid that replaced it."""

    sides: tuple[str, ...]
    dev_errors: int
    lm_grid: tuple[float, float, int]
    penalty_grid: tuple[float, float, int]

    def describe(self) -> str:
        lm, pen = self.lm_grid, self.penalty_grid
        return (f"the fewest-errors region ({self.dev_errors} errors) touched the grid's "
                f"{', '.join(_SIDE_LABELS[s] for s in self.sides)}; grid widened to LM "
                f"weight {lm[0]:g}..{lm[1]:g} ({lm[2]} points), penalty {pen[0]:g}..{pen[1]:g} "
                f"({pen[2]} points)")

    def to_dict(self) -> dict[str, Any]:
        return {"sides": list(self.sides), "dev_errors": self.dev_errors,
                "lm_grid": list(self.lm_grid), "penalty_grid": list(self.penalty_grid)}


@dataclass(frozen=True)
class TuneResult:
    """Tuned weights and how they were found.

    ``cv``, ``cv_warning`` and ``depth`` are filled in by :func:`tune`; the bare searches
    leave them empty. ``surface`` is the grid's error surface (``None`` for exact search).
    """

    weights: Weights
    dev_errors: int
    dev_wer: float
    one_best_wer: float
    oracle_wer: float
    reference_words: int
    utterances: int
    search: str
    tuned: tuple[str, ...]
    surface: Surface | None = None
    cv: CrossValidation | None = None
    cv_warning: str | None = None
    edge_warning: str | None = None
    depth: tuple[DepthRow, ...] = ()
    settings: Mapping[str, Any] = field(default_factory=dict)
    widenings: tuple[Widening, ...] = ()

    @property
    def cv_wer(self) -> float | None:
        """The cross-validated WER (``None`` without cross-validation)."""
        return None if self.cv is None else self.cv.wer

    @property
    def cv_gap(self) -> float | None:
        """Cross-validated WER minus dev WER, absolute (positive: worse on held-out data)."""
        return None if self.cv is None else self.cv.wer - self.dev_wer

    def record(self) -> TuningRecord:
        """The part of the run a report shows (:class:`TuningRecord`)."""
        return TuningRecord(self.surface, self.depth, self.weights.lm_weight,
                            self.weights.insertion_penalty)

    def search_record(self) -> dict[str, Any]:
        """How the weights were found, for the weights file's provenance: the search
        method, the weights it tuned, the dev result and every setting (grids, seed,
        folds, restarts, bounds)."""
        return {"search": self.search, "tuned": list(self.tuned), "dev_wer": self.dev_wer,
                "dev_errors": self.dev_errors, "settings": dict(self.settings)}

    def to_dict(self) -> dict[str, Any]:
        """The contract's tune JSON keys, then extras (acoustic scale, cv, depth, surface)."""
        out: dict[str, Any] = {
            LM_WEIGHT: self.weights.lm_weight,
            INSERTION_PENALTY: self.weights.insertion_penalty,
            "features": dict(self.weights.features),
            "dev_errors": self.dev_errors,
            "dev_wer": self.dev_wer,
            "one_best_wer": self.one_best_wer,
            "oracle_wer": self.oracle_wer,
            "search": self.search,
            ACOUSTIC_SCALE: self.weights.acoustic_scale,
            "tuned": list(self.tuned),
            "reference_words": self.reference_words,
            "utterances": self.utterances,
            "settings": dict(self.settings),
            "cv_wer": self.cv_wer,
            "cv_gap": self.cv_gap,
            "cv": None if self.cv is None else self.cv.to_dict(),
            "cv_warning": self.cv_warning,
            "edge_warning": self.edge_warning,
            "widenings": [w.to_dict() for w in self.widenings],
            "depth": [row.to_dict() for row in self.depth],
            "surface": None if self.surface is None else self.surface.to_dict(),
        }
        return out
