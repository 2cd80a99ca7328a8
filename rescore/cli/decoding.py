"""The command-line side of decoding beyond the single best: ``--choose`` (apply, tune)."""

from __future__ import annotations

import dataclasses
from enum import StrEnum
from typing import Annotated

import typer

from rescore.decode.choice import Rule
from rescore.decode.fit import DecodeFit
from rescore.weights import Weights


class ChooseRule(StrEnum):
    best = "best"
    min_risk = "min-risk"
    consensus = "consensus"


ChooseOpt = Annotated[ChooseRule | None, typer.Option(
    "--choose", help="What to output per utterance: best (highest combined score), "
    "min-risk (fewest expected word errors) or consensus (confusion-network vote). With "
    "it, or with weights that carry a posterior scale, each record gains chosen, "
    "word_confidences and word_posteriors; --text writes the chosen text. "
    "[default: the weights' rule, else best]", show_default=False)]


def with_rule(weights: Weights, choose: ChooseRule | None) -> Weights:
    """``weights`` with the rule given on the command line (unchanged without one)."""
    if choose is None:
        return weights
    return dataclasses.replace(weights, choose=choose.value)


def rule_value(choose: ChooseRule) -> Rule:
    return choose.value


def decoding_rows(fit: DecodeFit | None) -> list[list[str]]:
    """Rows of tune's table: the posterior scale, each rule's dev WER, the calibration."""
    if fit is None:
        return []
    rows = [["posterior scale (max. likelihood of dev oracle)", f"{fit.scale.scale:.4g}"]]
    rows += [[f"dev WER, --choose {rule}" + (" (stored)" if fit.rule_given and
                                              rule == fit.rule else ""), f"{100 * wer:.2f}%"]
             for rule, wer in fit.rule_wer.items()]

    def num(v: float | None) -> str:
        return "-" if v is None else f"{v:.3f}"
    rows.append(["word confidence NCE on dev, raw -> isotonic",
                 f"{num(fit.nce_raw)} -> {num(fit.nce_calibrated)}"])
    return rows
