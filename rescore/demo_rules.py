"""The demo's rows for the choice rules: ``min-risk`` and ``consensus`` with the weights
(and posterior scale) tuned on dev, applied to the test set, next to ``best``."""

from __future__ import annotations

import dataclasses
from collections.abc import Mapping
from pathlib import Path
from typing import Any

from rescore import pipeline
from rescore.nbest import iter_nbest, one_best
from rescore.text import tokens
from rescore.weights import INSERTION_PENALTY, LM_WEIGHT, Weights
from rescore.wer import word_errors

RULE_ROWS = ("min-risk", "consensus")


def chosen_wer(rescored: Path) -> float:
    """WER of the ``chosen`` text of a rescored file (its 1-best where none)."""
    errors = words = 0
    for _, utt in iter_nbest(rescored, require_references=True):
        ref = tokens(utt.get("reference", ""))
        errors += word_errors(ref, tokens(utt.get("chosen", one_best(utt)["text"])))
        words += len(ref)
    return errors / words if words else 0.0


def rule_rows(test: Path, out: Path, models: Mapping[str, pipeline.NamedModel],
              weights: Weights, tuned: Mapping[str, Any], dev_ppl: float, system: str
              ) -> tuple[list[dict[str, Any]], list[Path]]:
    """One comparison row per rule (``test_wer`` of its chosen text) and the files written."""
    rows: list[dict[str, Any]] = []
    written: list[Path] = []
    for rule in RULE_ROWS:
        rescored = out / f"test.{rule}.rescored.jsonl"
        pipeline.apply_file(test, rescored, models=dict(models),
                            weights=dataclasses.replace(weights, choose=rule))
        written.append(rescored)
        rows.append({"system": f"{system}, --choose {rule}",
                     "dev_perplexity": dev_ppl, "test_wer": chosen_wer(rescored),
                     LM_WEIGHT: tuned[LM_WEIGHT],
                     INSERTION_PENALTY: tuned[INSERTION_PENALTY],
                     "features": tuned["features"], "choose": rule})
    return rows, written
