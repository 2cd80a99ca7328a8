#!/usr/bin/env python3
"""The choice rules on the bundled demo, through the library (no command-line wiring yet).

Builds the demo's 3-gram LM from fixtures/demo/train.txt, tunes LM weight and insertion
penalty on dev.jsonl with today's grid search (as `rescore demo` does), fits the posterior
scale on dev, then prints the test WER of best, min-risk and consensus, and the word
confidences' NCE and ECE on test, raw and after the isotonic map fitted on dev.
``--combine`` adds a second simulated recognizer (the demo's own simulator, another random
stream: its errors are independent of the first's) and the test WER of each system and of
their merged lists, each tuned on its dev set.
Caution: a WER on one set guarantees nothing on another; validate on your own data.
"""

from __future__ import annotations

import json
import random
import sys
import tempfile
from pathlib import Path

import make_demo_data as simulator
import numpy as np

from rescore import pipeline
from rescore.decode.choice import RULES, Decision, decide
from rescore.decode.combine import combine_lists
from rescore.decode.confidence import IsotonicCalibration, nce, reliability, word_correct
from rescore.decode.posterior import fit_posterior_scale
from rescore.demo import BUNDLED
from rescore.lm import NGramModel, read_corpus, save_model
from rescore.nbest import iter_nbest, write_nbest
from rescore.scoring import FeatureMatrix, Weights, totals
from rescore.text import tokens
from rescore.weights import read_weights
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


def _tuned(models: dict[str, pipeline.NamedModel], dev_path: Path, test_path: Path,
           tmp: Path) -> tuple[Weights, FeatureMatrix, FeatureMatrix]:
    weights_path = tmp / f"weights.{dev_path.stem}.json"
    pipeline.tune_file(dev_path, models=models, search="grid", features=[], grid_lm=None,
                       grid_penalty=None, folds=0, seed=0, refs=None, log_base=None,
                       costs=None, weights_path=weights_path, analysis_path=None)
    weights = read_weights(weights_path)
    dev = pipeline.load_matrix(dev_path, models=models, features=[])
    test = pipeline.load_matrix(test_path, models=models, features=[])
    return weights, dev, test


def _second_system(data: Path, tmp: Path) -> None:
    """B's lists of the demo's dev and test references, and the merged A+B lists."""
    vendor = simulator.sentences(simulator.EVERYDAY,
                                 random.Random(f"{simulator.DEFAULT_SEED}/background"),
                                 simulator.FULL.background, set())
    recognizer = simulator.Recognizer(simulator.Unigram(vendor))
    for split in ("dev", "test"):
        first = [u for _, u in iter_nbest(data / f"{split}.jsonl")]
        lines = simulator.nbest_records(split, [u["reference"] for u in first], recognizer,
                                        random.Random(f"second-system/{split}"))
        (tmp / f"{split}.B.jsonl").write_text("".join(line + "\n" for line in lines))
        second = [json.loads(line) for line in lines]
        write_nbest(tmp / f"{split}.AB.jsonl",
                    combine_lists([("A", first), ("B", second)]).utterances)


def _combine(data: Path, models: dict[str, pipeline.NamedModel], tmp: Path) -> None:
    _second_system(data, tmp)
    print(f"{'system':<10} {'lm':>6} {'penalty':>8} {'scale':>7} "
          + " ".join(f"{r:>10}" for r in RULES))
    for name, dev_path, test_path in (
            ("A", data / "dev.jsonl", data / "test.jsonl"),
            ("B", tmp / "dev.B.jsonl", tmp / "test.B.jsonl"),
            ("A+B", tmp / "dev.AB.jsonl", tmp / "test.AB.jsonl")):
        weights, dev, test = _tuned(models, dev_path, test_path, tmp)
        assert dev.errors is not None
        scale = fit_posterior_scale(totals(dev, weights), dev.offsets, dev.errors).scale
        hyps, refs = _lists(test_path)
        wers = [corpus_wer(refs, [list(w) for w in _decide(test, weights, hyps, scale,
                                                            rule).words]).wer
                for rule in RULES]
        print(f"{name:<10} {weights.lm_weight:6.2f} {weights.insertion_penalty:8.2f} "
              f"{scale:7.3g} " + " ".join(f"{w:10.2%}" for w in wers))


def main(argv: list[str]) -> int:
    paths = [a for a in argv if not a.startswith("-")]
    data = Path(paths[0]) if paths else BUNDLED
    with tempfile.TemporaryDirectory() as name:
        tmp = Path(name)
        model_path = tmp / "logbook.lm"
        save_model(NGramModel(order=3).fit(read_corpus([data / "train.txt"])), model_path)
        models = pipeline.load_lms([str(model_path)])
        weights, dev, test = _tuned(models, data / "dev.jsonl", data / "test.jsonl", tmp)
        _rules(data, weights, dev, test)
        if "--combine" in argv:
            _combine(data, models, tmp)
    print("Caution: a WER on one set guarantees nothing on another; confidences are "
          "calibrated on dev and measured on this test set only; the second system's "
          "errors are simulated independent of the first's, which real recognizers' are not.")
    return 0


def _rules(data: Path, weights: Weights, dev: FeatureMatrix, test: FeatureMatrix) -> None:
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


if __name__ == "__main__":
    raise SystemExit(main(sys.argv[1:]))
