"""The choice rule of ``apply --choose`` on one batch of scored records.

:func:`choose_in_batch` runs after the top-scoring hypothesis is known (``best`` stays the
index of that hypothesis) and adds to each record ``chosen`` (the output text),
``word_confidences`` (``[[word, probability], ...]``: the calibrated posteriors when the
weights carry a calibration map, else the raw posteriors) and ``word_posteriors`` (the raw
posteriors, always). It does nothing unless the weights ask for a rule or carry a
posterior scale (:func:`wants_decoding`), so output made with older weights files is
unchanged byte for byte.

Under ``best`` and ``min-risk`` the output text is the chosen hypothesis's own spelling;
under ``consensus`` it is the normalised words of the bins joined by spaces. Without a
fitted scale the posterior scale is 1.0 (:data:`DEFAULT_SCALE`).
"""

from __future__ import annotations

from collections.abc import Sequence
from typing import cast

import numpy as np

from rescore.decode.choice import Decision, Rule, decide
from rescore.decode.confidence import IsotonicCalibration
from rescore.nbest import Utterance
from rescore.text import tokens_many
from rescore.weights import Weights

DEFAULT_SCALE = 1.0


def wants_decoding(weights: Weights) -> bool:
    """Whether records get ``chosen`` and word confidences."""
    return weights.choose is not None or weights.posterior_scale is not None


def rule_of(weights: Weights) -> Rule:
    return cast(Rule, weights.choose or "best")


def scale_of(weights: Weights) -> float:
    return DEFAULT_SCALE if weights.posterior_scale is None else weights.posterior_scale


def decide_records(utts: Sequence[Utterance], offsets: np.ndarray, total: np.ndarray,
                   weights: Weights, rule: Rule | None = None) -> Decision:
    """The decision of ``rule`` (default: the weights' rule) on records whose totals are
    ``total`` (rows in record order)."""
    texts = [h["text"] for utt in utts for h in utt["hypotheses"]]
    return decide(tokens_many(texts), offsets, total, scale=scale_of(weights),
                  rule=rule or rule_of(weights))


def choose_in_batch(utts: Sequence[Utterance], offsets: np.ndarray, total: np.ndarray,
                    weights: Weights) -> None:
    """Add ``chosen``, ``word_confidences`` and ``word_posteriors`` to every record (in
    place) when :func:`wants_decoding`."""
    if not wants_decoding(weights):
        return
    decision = decide_records(utts, offsets, total, weights)
    calibration = (None if weights.calibration is None
                   else IsotonicCalibration.from_dict(weights.calibration))
    for u, utt in enumerate(utts):
        row = int(decision.rows[u])
        if row >= 0:
            utt["chosen"] = utt["hypotheses"][row - int(offsets[u])]["text"]
        else:
            utt["chosen"] = " ".join(decision.words[u])
        raw = np.array(decision.confidences[u], dtype=np.float64)
        conf = raw if calibration is None else calibration.transform(raw)
        words = decision.words[u]
        utt["word_confidences"] = [
            (w, c) for w, c in zip(words, conf.tolist(), strict=True)]
        utt["word_posteriors"] = [
            (w, c) for w, c in zip(words, raw.tolist(), strict=True)]
