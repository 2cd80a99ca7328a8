"""The command-line side of decoding beyond the single best: ``--choose`` (apply, tune)."""

from __future__ import annotations

import dataclasses
from enum import Enum
from typing import Annotated

import typer

from rescore.weights import Weights


class ChooseRule(str, Enum):
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
