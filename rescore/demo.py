"""The bundled scenario end to end: the Larkspur Growhouse crew's spoken logbook.

Build a domain LM from the logbook text, tune LM weight and insertion penalty on the dev
N-best set, rescore the test set, and write the before/after figures and release report.
"""

from __future__ import annotations

import json
from collections.abc import Callable
from dataclasses import dataclass, field
from itertools import islice
from pathlib import Path
from typing import Any

from rescore import demo_rules, pipeline
from rescore.errors import InputError
from rescore.lm import NGramModel, load_model, perplexity, read_corpus, save_model
from rescore.lm.compare import SharedVocabulary
from rescore.lm.mix import compare_models, mix_models
from rescore.nbest import iter_nbest, one_best
from rescore.outputs import write_text_atomic
from rescore.provenance import run_provenance
from rescore.report import report_files
from rescore.scoring import OOV, oov_features, oracle_rows
from rescore.significance import with_interval
from rescore.text import tokens
from rescore.weights import INSERTION_PENALTY, LM, LM_WEIGHT, read_weights
from rescore.wer import WerResult, utterance_counts

# shipped inside the package (the wheel carries it); fixtures/demo links here for the tests
BUNDLED = Path(__file__).resolve().parent / "demo_data"
FILES = ("train.txt", "dev.txt", "dev.jsonl", "test.jsonl")
# In-domain sentences of the adaptation comparison: a new deployment's first days of logbook.
ADAPT_SENTENCES = 100
SMALL_ROW = f"in-domain, {ADAPT_SENTENCES} lines"
FULL_ROW = "in-domain, all lines"
# the mixed model again, with its unknown-word count as a tuned feature
OOV_ROW = f"mixed + {OOV}"


@dataclass(frozen=True)
class DemoResult:
    summary: dict[str, Any]
    before: WerResult  # each with its bootstrap interval
    after: WerResult
    oracle: WerResult
    perplexity: dict[str, Any]
    outputs: list[Path]
    comparison: list[dict[str, Any]] = field(default_factory=list)
    comparison_vocabulary: SharedVocabulary | None = None


def _silent(message: str) -> None:
    pass


def run_demo(out: Path, *, data_dir: Path | None = None, order: int = 3,
             progress: Callable[[str], None] = _silent) -> DemoResult:
    data = BUNDLED if data_dir is None else Path(data_dir)
    for name in FILES:
        if not (data / name).is_file():
            raise InputError(f"demo data file {name} is missing (pass --data DIR, or run "
                             "'make demo-data')", path=data / name)
    out.mkdir(parents=True, exist_ok=True)

    progress(f"building a {order}-gram LM from {data / 'train.txt'}")
    model = NGramModel(order=order).fit(read_corpus([data / "train.txt"]))
    model_path = out / "logbook.lm"
    save_model(model, model_path)
    ppl = perplexity(model, list(read_corpus([data / "dev.txt"]))).to_dict()
    progress(f"perplexity on dev text: {ppl['perplexity']:.2f}")

    models = pipeline.load_lms([str(model_path)])
    weights_path = out / "weights.json"
    analysis_path = out / "tuning.json"
    progress("tuning LM weight and insertion penalty on dev.jsonl")
    tuned = pipeline.tune_file(
        data / "dev.jsonl", models=models, search="grid", features=[], grid_lm=None,
        grid_penalty=None, folds=5, seed=0, refs=None, log_base=None, costs=None,
        weights_path=weights_path, analysis_path=analysis_path,
    ).to_dict()

    progress("rescoring test.jsonl")
    rescored = out / "test.rescored.jsonl"
    pipeline.apply_file(data / "test.jsonl", rescored, models=models,
                        weights=read_weights(weights_path),
                        text_path=out / "test.best.tsv")

    before, after, oracle = _test_wers(data / "test.jsonl", rescored, models)
    outputs = [model_path, weights_path, analysis_path, rescored, out / "test.best.tsv"]
    outputs += _report(data / "test.jsonl", rescored, out / "report", analysis_path,
                       weights_path,
                       run_provenance(data=[data / "test.jsonl"], models=models),
                       model_path)
    summary = {
        "wer_before": before.wer, "wer_after": after.wer, "oracle_wer": oracle.wer,
        LM_WEIGHT: tuned[LM_WEIGHT], INSERTION_PENALTY: tuned[INSERTION_PENALTY],
        "utterances": before.utterances,
        "dev_perplexity": ppl["perplexity"],
    }
    comparison: list[dict[str, Any]] = []
    shared: SharedVocabulary | None = None
    if (data / "background.txt").is_file():
        comparison, extra, shared = _compare(data, out, order, models, tuned,
                                             after.to_dict(), ppl["perplexity"], progress)
        outputs += extra
        # the choice rules with the same tuned weights (rescore.demo_rules)
        rule_rows, rule_files = demo_rules.rule_rows(data / "test.jsonl", out, models,
                                                     read_weights(weights_path), tuned,
                                                     ppl["perplexity"], FULL_ROW)
        comparison += rule_rows
        outputs += rule_files
        summary["comparison"] = comparison
        summary["comparison_vocabulary"] = shared.to_dict()
    write_text_atomic(out / "summary.json", json.dumps(summary, indent=2) + "\n")
    outputs.append(out / "summary.json")
    return DemoResult(summary, before, after, oracle, ppl, outputs, comparison, shared)


def _compare(data: Path, out: Path, order: int, in_models: dict[str, pipeline.NamedModel],
             in_tuned: dict[str, Any], in_after: dict[str, Any], in_ppl: float,
             progress: Callable[[str], None]
             ) -> tuple[list[dict[str, Any]], list[Path], SharedVocabulary]:
    """The everyday adaptation case: a general model and only a little in-domain text.

    The in-domain model here is built from the first ``ADAPT_SENTENCES`` logbook lines (a
    new deployment's first days), so the general model has something to add. Rows: the
    general model alone, the small in-domain model alone, their EM mixture (merged), both
    as log-linear features, and the full logbook model for reference.
    """
    progress(f"building a {order}-gram background LM from {data / 'background.txt'}")
    background = NGramModel(order=order).fit(read_corpus([data / "background.txt"]))
    progress(f"building a {order}-gram LM from the first {ADAPT_SENTENCES} logbook sentences")
    small = NGramModel(order=order).fit(
        islice(read_corpus([data / "train.txt"]), ADAPT_SENTENCES))
    bg_path, small_path = out / "background.lm", out / "logbook-small.lm"
    mix_path = out / "mixed.lm"
    save_model(background, bg_path)
    save_model(small, small_path)
    dev_text = list(read_corpus([data / "dev.txt"]))
    progress("mixing background and small in-domain LMs on dev.txt (EM)")
    _, merged, mixed = mix_models([background, small], dev_text)
    save_model(merged, mix_path)
    assert mixed.component_perplexities is not None
    bg_ppl, small_ppl = mixed.component_perplexities
    systems: list[tuple[str, list[str], float | None]] = [
        ("background only", [str(bg_path)], bg_ppl),
        (SMALL_ROW, [str(small_path)], small_ppl),
        ("mixed (merged model)", [str(mix_path)], mixed.merged_perplexity),
        (OOV_ROW, [str(mix_path)], mixed.merged_perplexity),
        ("log-linear, two LMs", [str(small_path), f"background={bg_path}"], None),
        (FULL_ROW, [str(in_models[LM].path)], in_ppl),
    ]
    # like with like: every model's perplexity on the same dev tokens, one vocabulary
    like = compare_models([background, small, merged, load_model(in_models[LM].path)], dev_text)
    measured = {"background only": 0, SMALL_ROW: 1, "mixed (merged model)": 2, OOV_ROW: 2,
                FULL_ROW: 3}
    rows: list[dict[str, Any]] = []
    written = [bg_path, small_path, mix_path]
    for name, specs, dev_ppl in systems:
        if name == FULL_ROW:
            tuned, wer = in_tuned, in_after
        else:
            progress(f"tuning and rescoring with {name}")
            tag = "mixed-oov" if name == OOV_ROW else name.split()[0].strip(",")
            models = pipeline.load_lms(specs)
            weights_path = out / f"weights.{tag}.json"
            tuned = pipeline.tune_file(
                data / "dev.jsonl", models=models, search=None,
                features=oov_features(list(models)) if name == OOV_ROW else [], grid_lm=None,
                grid_penalty=None, folds=0, seed=0, refs=None, log_base=None, costs=None,
                weights_path=weights_path, analysis_path=None,
            ).to_dict()
            rescored = out / f"test.{tag}.rescored.jsonl"
            pipeline.apply_file(data / "test.jsonl", rescored, models=models,
                                weights=read_weights(weights_path))
            wer = pipeline.wer_file(rescored).to_dict()
            written += [weights_path, rescored]
        rows.append({
            "system": name,
            "dev_perplexity": dev_ppl,
            **({"dev_perplexity_shared": like.shared[measured[name]],
                "dev_perplexity_own": like.own[measured[name]].perplexity,
                "dev_oov_own": like.own[measured[name]].oov}
               if name in measured else {}),
            "test_wer": wer["wer"],
            LM_WEIGHT: tuned[LM_WEIGHT],
            INSERTION_PENALTY: tuned[INSERTION_PENALTY],
            "features": tuned["features"],
            **({"mixture_weights": {"background": mixed.weights[0],
                                    "in-domain": mixed.weights[1]},
                "mixture_perplexity": mixed.perplexity}
               if name.startswith("mixed") else {}),
        })
    return rows, written, like.vocabulary


def _test_wers(test: Path, rescored: Path, models: dict[str, pipeline.NamedModel]
               ) -> tuple[WerResult, WerResult, WerResult]:
    refs, first, chosen = [], [], []
    for (_, orig), (_, new) in zip(iter_nbest(test, require_references=True),
                                   iter_nbest(rescored, require_references=True), strict=True):
        refs.append(tokens(orig["reference"]))
        first.append(tokens(orig["hypotheses"][0]["text"]))
        chosen.append(tokens(one_best(new)["text"]))
    # the oracle row of each list, from edit distances computed once in the matrix
    rows = oracle_rows(pipeline.load_matrix(test, models={}, features=[]))
    texts = [h["text"] for _, u in iter_nbest(test) for h in u["hypotheses"]]
    return (with_interval(utterance_counts(refs, first)),
            with_interval(utterance_counts(refs, chosen)),
            with_interval(utterance_counts(refs, [tokens(texts[r]) for r in rows])))


def _report(before: Path, after: Path, folder: Path, tuning: Path, weights: Path,
            provenance: dict[str, Any], model: Path) -> list[Path]:
    # the test references against the tuned model's training text (the leakage check)
    made = report_files(before, after, folder, tuning=tuning, weights=weights,
                        models=[(model.name, load_model(model))], provenance=provenance)
    return list(made.written)
