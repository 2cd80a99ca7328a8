"""One batch of N-best records through the choice kernel to the output files: the step
shared by a single-process ``apply`` (:mod:`rescore.pipeline`) and by each shard of a
parallel one (:mod:`rescore.parallel`), which both import it from here."""

from __future__ import annotations

from collections.abc import Iterator, Mapping, Sequence
from dataclasses import dataclass
from pathlib import Path

import numpy as np

from rescore.counting import PLAIN, Counting
from rescore.decode.apply_rule import choose_in_batch
from rescore.errors import AccountingError, InputError
from rescore.finite import check_totals
from rescore.limits import BATCH_BYTE_LIMIT
from rescore.listcheck import ListStats, score_stats
from rescore.nbest import Utterance, dumps, one_best
from rescore.outputs import TextSink
from rescore.scoring import LanguageModel, build_matrix, choose, totals
from rescore.text import tokens
from rescore.weights import ACOUSTIC, LM, Weights

DEFAULT_BATCH = 2000  # records read, scored and written together (memory stays flat)


def batches(items: Iterator[tuple[int, Utterance]], size: int,
            max_bytes: int = BATCH_BYTE_LIMIT) -> Iterator[list[tuple[int, Utterance]]]:
    """Consecutive lists of at most ``size`` records, closed early once the records' size
    (see :func:`record_bytes`) reaches ``max_bytes``: a few huge lines never fill a batch
    of thousands. A batch always holds at least one record."""
    batch: list[tuple[int, Utterance]] = []
    held = 0
    for item in items:
        batch.append(item)
        held += record_bytes(item[1])
        if len(batch) >= size or held >= max_bytes:
            yield batch
            batch, held = [], 0
    if batch:
        yield batch


def record_bytes(utt: Utterance) -> int:
    """About the size of a record as read (its texts, and a fixed share for each score and
    key); a cheap stand-in for the line's length, which the parsed record no longer has."""
    hyps = utt["hypotheses"]
    n = sum(len(h["text"]) for h in hyps) + 48 * len(hyps)
    n += 32 * sum(len(h["features"]) for h in hyps if "features" in h)
    n += len(utt["id"]) + len(utt.get("reference", ""))
    if "meta" in utt:
        n += len(dumps({"id": "", "hypotheses": [], "meta": utt["meta"]}))
    return n


@dataclass(frozen=True)
class WriteCounts:
    """What :func:`write_scored` wrote: 1-best changed from the first hypothesis, and
    outputs without words (the chosen text under ``--choose``, else the 1-best)."""

    changed: int = 0
    empty: int = 0

    def __add__(self, other: WriteCounts) -> WriteCounts:
        return WriteCounts(self.changed + other.changed, self.empty + other.empty)


def check_accounting(path: str | Path, read: int, done: int, what: str) -> None:
    """Every utterance read is accounted for: ``done`` (``what``) must equal ``read``."""
    if done != read:
        raise AccountingError(f"{read} utterances read but {done} {what} (a defect: please "
                              "report it)", path=path)


def write_scored(scored: Sequence[Utterance], fh: TextSink, tsv: TextSink | None, *,
                 path: str = "", lines: Sequence[int] = ()) -> WriteCounts:
    """Write rescored records (and their output text); returns how many changed 1-best
    and how many output no words (see :func:`_output_words`).

    ``path`` and ``lines`` (the records' line numbers) name an id that the ``id<TAB>text``
    file cannot hold.
    """
    if tsv is not None:
        _check_tsv_ids(scored, path, lines)
    fh.write("".join(dumps(utt) + "\n" for utt in scored))
    if tsv is not None:
        # the output text: the choice rule's when it ran (--choose), else the 1-best
        tsv.write("".join(
            f"{utt['id']}\t{_one_line(utt.get('chosen', one_best(utt)['text']))}\n"
            for utt in scored))
    changed = sum(1 for utt in scored if utt.get("best", 0) != 0)
    empty = sum(1 for utt in scored if not _output_words(utt))
    return WriteCounts(changed, empty)


def _output_words(utt: Utterance) -> int:
    """Words of the text the record outputs: ``chosen`` when the choice rule ran (it may
    be words no hypothesis holds, or empty while the top-scoring hypothesis is not), else
    the 1-best's."""
    if "chosen" in utt:
        return len(tokens(utt["chosen"]))
    # ``word_count`` is set on every hypothesis by rescore_batch; records written as they were
    # read may lack it, and then the text is counted
    best = one_best(utt)
    return best.get("word_count", len(tokens(best["text"])))


def _check_tsv_ids(scored: Sequence[Utterance], path: str, lines: Sequence[int]) -> None:
    ids = "".join(utt["id"] for utt in scored)
    if "\t" not in ids and "\n" not in ids and "\r" not in ids:
        return
    for i, utt in enumerate(scored):
        if any(c in utt["id"] for c in "\t\n\r"):
            raise InputError("contains a tab or line break, which an id<TAB>text file "
                             "(--text) cannot hold", path=path or None,
                             line=lines[i] if i < len(lines) else None, field="id")


def _one_line(text: str) -> str:
    # a tab or line break inside the text would split its 'id<TAB>text' line; normalisation
    # reads each as a space, so the words and the WER are unchanged
    return text.translate(_TSV_BREAKS) if "\t" in text or "\n" in text or "\r" in text \
        else text


_TSV_BREAKS = str.maketrans("\t\n\r", "   ")


def rescore_batch(batch: Sequence[tuple[int, Utterance]], *, path: str,
                  lms: Mapping[str, LanguageModel], features: Sequence[str],
                  weights: Weights, counting: Counting = PLAIN
                  ) -> tuple[list[Utterance], ListStats]:
    """The batch's records with ``lm``, ``word_count``, ``total`` and ``best`` filled in, and
    the sign and order counts of their acoustic scores (``word_count`` counts the tokens of
    ``counting``'s unit: characters for ``char``)."""
    m = build_matrix(batch, path=path, lms=lms, features=features, counting=counting).matrix
    with np.errstate(over="ignore", invalid="ignore"):  # refused below, naming the weight
        total = totals(m, weights)
    check_totals(total, m, weights.vector(m.names), path=path,
                 lines=[line for line, _ in batch])
    best = choose(m, weights, total)
    # whole columns to Python numbers at once (tolist), then one pass over the hypotheses
    words = m.values[:, m.names.index("words")].astype(np.int64).tolist()
    scores = total.tolist()
    hyps = [hyp for _, utt in batch for hyp in utt["hypotheses"]]
    if LM in m.names:
        for hyp, lm, w, t in zip(hyps, m.values[:, m.names.index(LM)].tolist(), words, scores,
                                 strict=True):
            hyp.pop("words", None)  # the name before word_count, on a file rescored again
            hyp["lm"], hyp["word_count"], hyp["total"] = lm, w, t
    else:
        for hyp, w, t in zip(hyps, words, scores, strict=True):
            hyp.pop("words", None)
            hyp["word_count"], hyp["total"] = w, t
    for (_, utt), b in zip(batch, best.tolist(), strict=True):
        utt["best"] = b
    choose_in_batch([utt for _, utt in batch], m.offsets, total, weights)  # --choose
    return [utt for _, utt in batch], score_stats(m.column(ACOUSTIC), m.offsets)
