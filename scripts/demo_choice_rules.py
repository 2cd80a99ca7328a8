#!/usr/bin/env python3
"""The choice rules on the bundled demo, through the library (no command-line wiring yet).

Builds the demo's 3-gram LM from fixtures/demo/train.txt, tunes LM weight and insertion
penalty on dev.jsonl with today's grid search (as `rescore demo` does), fits the posterior
scale on dev, then prints the test WER of best, min-risk and consensus, and the word
confidences' NCE and ECE on test, raw and after the isotonic map fitted on dev.
Caution: a WER on one set guarantees nothing on another; validate on your own data.
"""

from __future__ import annotations

import sys
import tempfile
from pathlib import Path

import numpy as np

from rescore import pipeline
from rescore.decode.choice import RULES, Decision, decide
from rescore.decode.confidence import IsotonicCalibration, nce, reliability, word_correct
from rescore.decode.posterior import fit_posterior_scale
from rescore.demo import BUNDLED
from rescore.lm import NGramModel, read_corpus, save_model
from rescore.nbest import iter_nbest
from rescore.scoring import FeatureMatrix, Weights, totals
from rescore.text import tokens
from rescore.wer import corpus_wer


def _lists(path: Path) -> tuple[list[list[str]], list[list[str]]]:
    hyps, refs = [], []
    for _, utt in iter_nbest(path, require_references=True):
        refs.append(tokens(utt["reference"]))
        hyps.extend(tokens(h["text"]) for h in utt["hypotheses"])
    return hyps, refs


def _decide(matrix: FeatureMatrix, weights: Weights, hyps: list[list[str]], scale: float,
            rule: str) -> Decision:
    return decide(hyps, matrix.offsets, totals(matrix, weights), scale=scale,
                  rule=rule)  # type: ignore[arg-type]


def _confidences(decision: Decision, refs: list[list[str]]) -> tuple[np.ndarray, np.ndarray]:
    conf = np.array([c for cs in decision.confidences for c in cs])
    right = np.concatenate([word_correct(r, w) for r, w in zip(refs, decision.words,
                                                               strict=True)] or [[]])
    return conf, right.astype(bool)


def main(argv: list[str]) -> int:
    data = Path(argv[0]) if argv else BUNDLED
    with tempfile.TemporaryDirectory() as tmp:
        model_path = Path(tmp) / "logbook.lm"
        save_model(NGramModel(order=3).fit(read_corpus([data / "train.txt"])), model_path)
        models = pipeline.load_lms([str(model_path)])
        weights_path = Path(tmp) / "weights.json"
        pipeline.tune_file(data / "dev.jsonl", models=models, search="grid", features=[],
                           grid_lm=None, grid_penalty=None, folds=0, seed=0, refs=None,
                           log_base=None, costs=None, weights_path=weights_path,
                           analysis_path=None)
        weights = pipeline.read_weights(weights_path)
        dev = pipeline.load_matrix(data / "dev.jsonl", models=models, features=[])
        test = pipeline.load_matrix(data / "test.jsonl", models=models, features=[])
    assert dev.errors is not None
    fit = fit_posterior_scale(totals(dev, weights), dev.offsets, dev.errors)
    print(f"weights: lm {weights.lm_weight}, penalty {weights.insertion_penalty}; "
          f"posterior scale {fit.scale:.4g} (dev oracle log-likelihood "
          f"{fit.log_likelihood:.1f}{', at a bound' if fit.at_bound else ''})")
    dev_hyps, dev_refs = _lists(data / "dev.jsonl")
    test_hyps, test_refs = _lists(data / "test.jsonl")
    print(f"{'rule':<10} {'dev WER':>8} {'test WER':>9} {'NCE raw':>8} {'NCE cal':>8} "
          f"{'ECE raw':>8} {'ECE cal':>8}")
    for rule in RULES:
        on_dev = _decide(dev, weights, dev_hyps, fit.scale, rule)
        on_test = _decide(test, weights, test_hyps, fit.scale, rule)
        dev_wer = corpus_wer(dev_refs, [list(w) for w in on_dev.words]).wer
        test_wer = corpus_wer(test_refs, [list(w) for w in on_test.words]).wer
        cal = IsotonicCalibration.fit(*_confidences(on_dev, dev_refs))
        conf, right = _confidences(on_test, test_refs)
        raw_nce, cal_nce = nce(conf, right), nce(cal.transform(conf), right)
        print(f"{rule:<10} {dev_wer:8.2%} {test_wer:9.2%} {raw_nce or float('nan'):8.3f} "
              f"{cal_nce or float('nan'):8.3f} {reliability(conf, right).ece:8.3f} "
              f"{reliability(cal.transform(conf), right).ece:8.3f}")
    print("Caution: a WER on one set guarantees nothing on another; confidences are "
          "calibrated on dev and measured on this test set only.")
    return 0


if __name__ == "__main__":
    raise SystemExit(main(sys.argv[1:]))
