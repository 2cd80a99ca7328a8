"""The second bundled scenario: the Midoridani mushroom cellar's log, in Japanese.

Japanese is written without spaces, so everything here counts characters
(:class:`rescore.counting.Counting` with unit ``char``): a character n-gram LM from the log
text, LM weight and insertion penalty tuned on the dev N-best set by CER, the test set
rescored, and a release report in CER. The data comes from
``scripts/make_kana_demo_data.py``.
"""

from __future__ import annotations

import json
from collections.abc import Callable
from dataclasses import dataclass
from pathlib import Path
from typing import Any

from rescore import pipeline
from rescore.counting import Counting
from rescore.errors import InputError
from rescore.lm import NGramModel, perplexity, read_corpus, save_model
from rescore.lm.corpus import char_sentences
from rescore.nbest import iter_nbest
from rescore.outputs import write_text_atomic
from rescore.report import report_files
from rescore.scoring import oracle_rows
from rescore.significance import with_interval
from rescore.weights import INSERTION_PENALTY, LM_WEIGHT, read_weights
from rescore.wer import WerResult, utterance_counts

BUNDLED_KANA = Path(__file__).resolve().parent / "demo_data" / "kana"
FILES = ("train.txt", "dev.txt", "dev.jsonl", "test.jsonl")
CHARS = Counting("char")
ORDER = 5  # characters: a 5-gram spans about two short words


@dataclass(frozen=True)
class KanaDemoResult:
    summary: dict[str, Any]
    before: WerResult
    after: WerResult
    oracle: WerResult
    outputs: list[Path]


def _silent(message: str) -> None:
    pass


def run_kana_demo(out: Path, *, data_dir: Path | None = None, order: int = ORDER,
                  progress: Callable[[str], None] = _silent) -> KanaDemoResult:
    """Build, tune, rescore and report the scenario at the character unit into ``out``."""
    data = BUNDLED_KANA if data_dir is None else Path(data_dir)
    for name in FILES:
        if not (data / name).is_file():
            raise InputError(f"demo data file {name} is missing", path=data / name)
    out.mkdir(parents=True, exist_ok=True)
    progress(f"building a {order}-gram character LM from {data / 'train.txt'}")
    model = NGramModel(order=order).fit(char_sentences(read_corpus([data / "train.txt"])))
    model.mark_unit("char")
    model_path = out / "cellar.chars.lm"
    save_model(model, model_path)
    ppl = perplexity(model, list(char_sentences(read_corpus([data / "dev.txt"])))).to_dict()
    progress(f"perplexity per character on dev text: {ppl['perplexity']:.2f}")

    models = pipeline.load_lms([str(model_path)])
    weights_path, analysis_path = out / "weights.json", out / "tuning.json"
    progress("tuning LM weight and insertion penalty on dev.jsonl (by CER)")
    tuned = pipeline.tune_file(
        data / "dev.jsonl", models=models, search="grid", features=[], grid_lm=None,
        grid_penalty=None, folds=5, seed=0, refs=None, log_base=None, costs=None,
        weights_path=weights_path, analysis_path=analysis_path, counting=CHARS,
    ).to_dict()
    progress("rescoring test.jsonl")
    rescored = out / "test.rescored.jsonl"
    pipeline.apply_file(data / "test.jsonl", rescored, models=models,
                        weights=read_weights(weights_path), text_path=out / "test.best.tsv",
                        counting=CHARS)
    before = pipeline.wer_file(data / "test.jsonl", counting=CHARS)
    after = pipeline.wer_file(rescored, counting=CHARS)
    oracle = _oracle(data / "test.jsonl")
    made = report_files(data / "test.jsonl", rescored, out / "report", tuning=analysis_path,
                        weights=weights_path, counting=CHARS)
    summary = {"unit": "char", "cer_before": before.wer, "cer_after": after.wer,
               "oracle_cer": oracle.wer, LM_WEIGHT: tuned[LM_WEIGHT],
               INSERTION_PENALTY: tuned[INSERTION_PENALTY], "utterances": before.utterances,
               "dev_perplexity_per_character": ppl["perplexity"]}
    write_text_atomic(out / "summary.json", json.dumps(summary, indent=2) + "\n")
    outputs = [model_path, weights_path, analysis_path, rescored, out / "test.best.tsv",
               *made.written, out / "summary.json"]
    return KanaDemoResult(summary, before, after, oracle, outputs)


def _oracle(test: Path) -> WerResult:
    """The CER of the fewest-error hypothesis of every list."""
    rows = oracle_rows(pipeline.load_matrix(test, models={}, features=[], counting=CHARS))
    utts = [u for _, u in iter_nbest(test, require_references=True)]
    texts = [h["text"] for u in utts for h in u["hypotheses"]]
    counts = utterance_counts([CHARS.score_tokens(u["reference"]) for u in utts],
                              [CHARS.score_tokens(texts[r]) for r in rows])
    return with_interval(counts)
