"""What a tuning run returns: the tuned weights, the error surface, folds, the depth table and
grid widenings."""

from __future__ import annotations

from collections.abc import Mapping
from dataclasses import dataclass, field
from typing import Any

import numpy as np

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
    baseline_wer: float
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
            "baseline_wer": self.baseline_wer,
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
