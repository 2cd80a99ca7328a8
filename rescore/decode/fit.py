"""Fitting the decoding part of the weights on dev, after the score weights are tuned.

1. The posterior scale: maximum likelihood of each dev list's fewest-error hypotheses
   (:func:`rescore.decode.posterior.fit_posterior_scale`, which says why that criterion).
2. The dev WER of every choice rule with the tuned weights and that scale.
3. A calibration map from raw word posterior to probability of being correct: isotonic
   regression (pool-adjacent-violators) of each chosen dev word's correctness, by its
   alignment against the reference, on its posterior under the rule that will be applied
   (the one given, else ``best``).
"""

from __future__ import annotations

import dataclasses
from collections.abc import Mapping, Sequence
from dataclasses import dataclass
from pathlib import Path
from typing import Any

import numpy as np

from rescore.decode.choice import RULES, Decision, Rule, decide
from rescore.decode.confidence import IsotonicCalibration, nce, reliability, word_correct
from rescore.decode.posterior import ScaleFit, fit_posterior_scale
from rescore.decode.words import Codebook
from rescore.nbest import iter_nbest
from rescore.scoring import FeatureMatrix, totals
from rescore.text import tokens, tokens_many
from rescore.weights import Weights
from rescore.wer import word_errors


@dataclass(frozen=True)
class DevTexts:
    """The normalised words of every dev hypothesis (rows as in the tuning matrix) and of
    every reference."""

    hypotheses: tuple[list[str], ...]
    references: tuple[list[str], ...]


def read_dev_texts(path: str | Path, *, refs: Mapping[str, str] | None = None,
                   log_base: float | None = None, costs: bool | None = None) -> DevTexts:
    """The words of ``path``'s hypotheses and references (no scoring)."""
    hyps: list[str] = []
    ref_words: list[list[str]] = []
    for _, utt in iter_nbest(path, refs=refs, log_base=log_base, costs=costs,
                             require_references=True):
        hyps.extend(h["text"] for h in utt["hypotheses"])
        ref_words.append(tokens(utt.get("reference", "")))
    return DevTexts(tuple(tokens_many(hyps)), tuple(ref_words))


@dataclass(frozen=True)
class DecodeFit:
    """What :func:`fit_decoding` found on dev."""

    scale: ScaleFit
    rule: Rule
    rule_given: bool
    rule_wer: Mapping[str, float]
    calibration: IsotonicCalibration
    nce_raw: float | None
    nce_calibrated: float | None
    ece_raw: float
    ece_calibrated: float
    words: int

    def apply_to(self, weights: Weights) -> Weights:
        return dataclasses.replace(weights, posterior_scale=self.scale.scale,
                                   calibration=self.calibration.to_dict(),
                                   choose=self.rule if self.rule_given else None)

    def to_dict(self) -> dict[str, Any]:
        """The provenance of the decoding keys (plain values)."""
        return {"posterior_scale": self.scale.to_dict(),
                "dev_wer_by_rule": dict(self.rule_wer), "rule": self.rule,
                "calibration": {"method": self.calibration.method, "fitted_on": self.rule,
                                "words": self.words, "nce_raw": self.nce_raw,
                                "nce_calibrated": self.nce_calibrated,
                                "ece_raw": self.ece_raw,
                                "ece_calibrated": self.ece_calibrated}}


def _wer(decision: Decision, refs: Sequence[list[str]]) -> float:
    errors = sum(word_errors(r, list(w)) for r, w in zip(refs, decision.words, strict=True))
    total = sum(len(r) for r in refs)
    return errors / total if total else 0.0


def fit_decoding(matrix: FeatureMatrix, weights: Weights, texts: DevTexts,
                 rule: Rule | None = None) -> DecodeFit:
    """Fit the posterior scale and the calibration on dev; measure every rule's dev WER.

    Raises
    ------
    ValueError
        When the matrix has no errors (no references) or the texts do not match it.
    """
    if matrix.errors is None:
        raise ValueError("fitting the posterior scale needs references")
    if len(texts.hypotheses) != matrix.n_hypotheses:
        raise ValueError(f"{len(texts.hypotheses)} texts for {matrix.n_hypotheses} rows")
    total = totals(matrix, weights)
    scale = fit_posterior_scale(total, matrix.offsets, matrix.errors)
    decisions = {r: decide(texts.hypotheses, matrix.offsets, total, scale=scale.scale,
                           rule=r) for r in RULES}  # type: ignore[arg-type]
    rule_wer = {r: _wer(d, texts.references) for r, d in decisions.items()}
    used: Rule = rule or "best"
    decision = decisions[used]
    book = Codebook()
    correct = np.concatenate([word_correct(r, w, book) for r, w in
                              zip(texts.references, decision.words, strict=True)]
                             + [np.zeros(0, dtype=bool)])
    raw = np.array([c for cs in decision.confidences for c in cs], dtype=np.float64)
    if len(raw) == 0:
        raise ValueError("no output words on dev to calibrate on")
    calibration = IsotonicCalibration.fit(raw, correct)
    calibrated = calibration.transform(raw)
    return DecodeFit(scale=scale, rule=used, rule_given=rule is not None, rule_wer=rule_wer,
                     calibration=calibration, nce_raw=nce(raw, correct),
                     nce_calibrated=nce(calibrated, correct),
                     ece_raw=reliability(raw, correct).ece,
                     ece_calibrated=reliability(calibrated, correct).ece, words=len(raw))
