"""The public Python API: the whole job (model, N-best lists, tuning, rescoring, WER,
report) in a dozen functions that accept objects in memory as well as paths.

Each function is a thin wrapper over the library module that owns its concept and
validates its arguments once, here, at the boundary; re-exported from :mod:`rescore`.
"""

from __future__ import annotations

from collections.abc import Iterable, Mapping, Sequence
from pathlib import Path
from typing import Any

from rescore import pipeline
from rescore.batch import rescore_batch
from rescore.counting import counting_of
from rescore.errors import ParameterError
from rescore.lm import NGramModel, read_corpus
from rescore.lm import load_model as _load_model
from rescore.lm import save_model as _save_model
from rescore.nbest import Utterance, iter_nbest, one_best, read_refs
from rescore.report import Report, report_files
from rescore.scoring import FeatureMatrix, LanguageModel, build_matrix
from rescore.text import NORMALISATION, tokens
from rescore.tune import TuneResult
from rescore.tune import tune as _tune
from rescore.version import __version__
from rescore.weights import LM, Weights, write_weights
from rescore.wer import WerResult, corpus_wer, summarise

Source = str | Path | Iterable[str]
NBest = str | Path | Sequence[Utterance]
_MEMORY = "<memory>"


def build_model(text: Source, *, order: int = 3, method: str = "mkn") -> NGramModel:
    """Build an n-gram language model from training text.

    Parameters
    ----------
    text : str, Path or iterable of str
        A :class:`~pathlib.Path` (or a list of them) names training files, one sentence
        a line; a ``str`` is the training text itself, one sentence a line; any other
        iterable of ``str`` gives one sentence per item. Text is normalised as N-best
        hypotheses are.
    order : int, default 3
        The n-gram order.
    method : str, default "mkn"
        The smoothing method (see :data:`rescore.lm.METHODS`).

    Returns
    -------
    NGramModel
        The fitted model, usable in memory or saved with :func:`save_model`.

    Raises
    ------
    InputError
        No sentence with words in the text, or a training file that cannot be read.
    ParameterError
        An order or method the model does not support.

    Examples
    --------
    >>> model = build_model("the pump is on\\nthe vent is open", order=2)
    >>> model.order
    2
    """
    if isinstance(text, Path) or (not isinstance(text, str) and isinstance(text, list)
                                  and text and all(isinstance(p, Path) for p in text)):
        sentences: Iterable[Sequence[str]] = read_corpus(text)
    else:
        lines = text.splitlines() if isinstance(text, str) else list(text)
        sentences = [words for words in map(tokens, lines) if words]
    return NGramModel(order=order, method=method).fit(sentences)


def load_model(path: str | Path) -> NGramModel:
    """Load a model file: the native format, or ARPA text (``.arpa``, ``.arpa.gz``).

    Parameters
    ----------
    path : str or Path
        The model file.

    Returns
    -------
    NGramModel
        The model.

    Raises
    ------
    ModelFileError
        A truncated, altered or foreign model file.

    Examples
    --------
    >>> import tempfile, pathlib
    >>> folder = pathlib.Path(tempfile.mkdtemp())
    >>> save_model(build_model("a b c"), folder / "m.lm")
    >>> load_model(folder / "m.lm").order
    3
    """
    return _load_model(path)


def save_model(model: NGramModel, path: str | Path) -> None:
    """Write a model atomically: ARPA text for a ``.arpa``/``.arpa.gz`` name, else native.

    Parameters
    ----------
    model : NGramModel
        A fitted model.
    path : str or Path
        Where to write it; nothing appears there unless the write completes.

    Returns
    -------
    None

    Raises
    ------
    OutputError
        The file could not be written whole.

    Examples
    --------
    >>> import tempfile, pathlib
    >>> save_model(build_model("a b c"), pathlib.Path(tempfile.mkdtemp()) / "m.arpa")
    """
    _save_model(model, path)


def read_nbest(path: str | Path, *, refs: str | Path | Mapping[str, str] | None = None
               ) -> list[Utterance]:
    """Read and validate an N-best file (JSON Lines, ``.gz`` read transparently).

    Parameters
    ----------
    path : str or Path
        The N-best file.
    refs : str, Path or mapping, optional
        References by utterance id (an ``id<TAB>text`` file or a mapping) replacing
        those in the file.

    Returns
    -------
    list of dict
        The utterances, scores as natural-log likelihoods (higher is better).

    Raises
    ------
    InputError
        A malformed record, named by file, line and field.

    Examples
    --------
    >>> lists = read_nbest("fixtures/demo/test.jsonl")  # doctest: +SKIP
    >>> lists[0]["hypotheses"][0]["text"]  # doctest: +SKIP
    """
    return [u for _, u in iter_nbest(path, refs=_refs(refs))]


def tune_weights(nbest: NBest, *, lm: LanguageModel | str | Path | None = None,
         search: str | None = None, features: Sequence[str] = (),
         weights_path: str | Path | None = None, **options: Any) -> TuneResult:
    """Tune the LM weight and insertion penalty (and feature weights) on a dev set.

    Parameters
    ----------
    nbest : str, Path or list of dict
        The dev set's N-best lists (a file, or utterances from :func:`read_nbest`);
        every utterance needs a reference.
    lm : NGramModel, str or Path, optional
        The language model (an object in memory or a model file); without one only the
        insertion penalty and features are tuned.
    search : {"grid", "exact"}, optional
        The search; by default grid for the two standard weights, exact with features.
    features : sequence of str
        Names of hypothesis features to weight as well.
    weights_path : str or Path, optional
        Write the weights file here; nothing is written without it.
    **options
        Further settings of :func:`rescore.tune.tune` (``lm_grid``, ``penalty_grid``,
        ``folds``, ``seed``, ``bounds``, ``widen``...).

    Returns
    -------
    TuneResult
        ``.weights`` the tuned :class:`Weights`; ``.dev_wer``, ``.one_best_wer``,
        ``.oracle_wer`` and the search record.

    Raises
    ------
    InputError
        A malformed dev set or one without references.
    ParameterError
        A setting outside its range.

    Examples
    --------
    >>> result = tune_weights("fixtures/demo/dev.jsonl", lm=model)  # doctest: +SKIP
    >>> result.weights.lm_weight  # doctest: +SKIP
    """
    model = _model(lm)
    lms = {} if model is None else {LM: model}
    matrix = _matrix(nbest, lms, features, with_errors=True)
    result = _tune(matrix, search=search, features=features,
                   lm_column=LM if model is not None else None, **options)
    if weights_path is not None:
        write_weights(weights_path, result.weights,
                      {"package": "rescore", "version": __version__,
                       "normalisation": NORMALISATION, **result.search_record()})
    return result


def apply(nbest: NBest, weights: Weights, *, lm: LanguageModel | str | Path | None = None
          ) -> list[Utterance]:
    """Rescore N-best lists in memory: each gets ``lm``, ``words``, ``total`` and ``best``.

    Parameters
    ----------
    nbest : str, Path or list of dict
        The N-best lists (a file, or utterances from :func:`read_nbest`; these are
        filled in place).
    weights : Weights
        The weights, e.g. ``tune_weights(...).weights`` or :func:`read_weights`.
    lm : NGramModel, str or Path, optional
        The language model, needed when the weights give it weight.

    Returns
    -------
    list of dict
        The utterances, ``best`` the index of the chosen hypothesis.

    Raises
    ------
    InputError
        A malformed record, or a weighted feature a hypothesis lacks.
    UsageError
        The weights give LM weight but no ``lm`` was given.

    Examples
    --------
    >>> rescored = apply(lists, result.weights, lm=model)  # doctest: +SKIP
    """
    model = _model(lm)
    lms = {} if model is None else {LM: model}
    features = pipeline.check_weighted(weights, lms)
    items = _items(nbest)
    return rescore_batch(items, path=_where(nbest), lms=lms, features=features,
                         weights=weights)[0] if items else []


def apply_file(nbest: str | Path, out: str | Path, weights: Weights, *,
               lm: str | Path | None = None, text_path: str | Path | None = None,
               workers: int = 1) -> pipeline.ApplyResult:
    """Rescore an N-best file into another, streaming (memory stays flat).

    Parameters
    ----------
    nbest : str or Path
        The input N-best file.
    out : str or Path
        The rescored N-best file; it appears only when complete.
    weights : Weights
        The weights.
    lm : str or Path, optional
        The language model file.
    text_path : str or Path, optional
        Also write the 1-best as ``id<TAB>text`` lines here.
    workers : int, default 1
        Processes to share the work; the output is the same byte for byte.

    Returns
    -------
    ApplyResult
        Utterances read, and how many changed their 1-best.

    Raises
    ------
    InputError
        A malformed record (no output is left behind).

    Examples
    --------
    >>> apply_file("test.jsonl", "test.rescored.jsonl", weights, lm="logbook.lm")  # doctest: +SKIP
    """
    models = {} if lm is None else pipeline.load_lms([str(lm)])
    return pipeline.apply_file(Path(nbest), Path(out), models=models, weights=weights,
                               text_path=None if text_path is None else Path(text_path),
                               workers=workers)


def word_error_rate(nbest_or_references: NBest | Sequence[str],
        hypotheses: Sequence[str] | None = None, *, unit: str = "word",
        rules: str | Path | None = None) -> WerResult:
    """Corpus word error rate, text normalised as everywhere in rescore (or the character
    error rate with ``unit="char"``, and under a scoring-rules file with ``rules``).

    Parameters
    ----------
    nbest_or_references : str, Path, list of dict or list of str
        N-best lists with references (a file or utterances: their 1-best, the hypothesis
        at ``best``, is scored), or the reference texts when ``hypotheses`` is given.
    hypotheses : list of str, optional
        Hypothesis texts, one per reference.
    unit : {"word", "char"}
        The unit counted: words, or characters with the spaces dropped (CER).
    rules : str or Path, optional
        A scoring-rules file (TOML; see :mod:`rescore.rules`).

    Returns
    -------
    WerResult
        ``.wer`` and the substitution, deletion and insertion counts.

    Raises
    ------
    InputError
        An utterance without a reference.
    ParameterError
        Unequal numbers of references and hypotheses.

    Examples
    --------
    >>> word_error_rate(["the pump is on"], ["the pump on"]).wer
    0.25
    >>> word_error_rate(["三号泵"], ["三号"], unit="char").wer
    0.3333333333333333
    """
    counting = counting_of(rules, unit)
    if not counting.plain:
        if hypotheses is not None:
            refs_t = [str(r) for r in nbest_or_references]  # type: ignore[union-attr]
            if len(refs_t) != len(hypotheses):
                raise ParameterError(f"{len(refs_t)} references for {len(hypotheses)} "
                                     "hypotheses", field="hypotheses")
            return summarise(counting.counts(refs_t, list(hypotheses)))
        found = _items(nbest_or_references, require_references=True)  # type: ignore[arg-type]
        return summarise(counting.counts([u["reference"] for _, u in found],
                                         [one_best(u)["text"] for _, u in found]))
    if hypotheses is not None:
        refs = [str(r) for r in nbest_or_references]  # type: ignore[union-attr]
        if len(refs) != len(hypotheses):
            raise ParameterError(f"{len(refs)} references for {len(hypotheses)} hypotheses",
                                 field="hypotheses")
        return corpus_wer([tokens(str(r)) for r in refs], [tokens(h) for h in hypotheses])
    items = _items(nbest_or_references, require_references=True)  # type: ignore[arg-type]
    for line, utt in items:
        if "reference" not in utt:
            raise ParameterError("every utterance needs a reference", line=line,
                                 field="nbest_or_references")
    return corpus_wer([tokens(u["reference"]) for _, u in items],
                      [tokens(one_best(u)["text"]) for _, u in items])


def release_report(before: str | Path, after: str | Path, *, out_dir: str | Path | None = None,
           refs: str | Path | Mapping[str, str] | None = None, **options: Any) -> Report:
    """Compare two systems on the same utterances: WER, CER, significance, breakdowns.

    Parameters
    ----------
    before, after : str or Path
        Each an N-best file (its 1-best) or an ``id<TAB>text`` transcript file.
    out_dir : str or Path, optional
        Write ``report.json``, ``report.md`` and ``report.html`` here; nothing is written
        without it.
    refs : str, Path or mapping, optional
        References by id (needed for transcript files).
    **options
        Further settings of :func:`rescore.report.report_files` (``tuning``,
        ``weights``, ``terms``, ``models``, ``resamples``, ``seed``, ``max_wer``...).

    Returns
    -------
    Report
        Everything the report files show. A WER on one set guarantees nothing on another:
        validate on your own data and follow your field's rules.

    Raises
    ------
    InputError
        Systems on different utterances, or a file that cannot be read.

    Examples
    --------
    >>> r = release_report("test.jsonl", "test.rescored.jsonl")  # doctest: +SKIP
    >>> r.after.wer < r.before.wer  # doctest: +SKIP
    """
    return report_files(before, after, out_dir, refs=_refs(refs), **options).report


# --- the boundary's conversions ----------------------------------------------------------

def _refs(refs: str | Path | Mapping[str, str] | None) -> Mapping[str, str] | None:
    if refs is None or isinstance(refs, Mapping):
        return refs
    return read_refs(refs)


def _model(lm: LanguageModel | str | Path | None) -> LanguageModel | None:
    if lm is None or hasattr(lm, "logprob"):
        return lm
    if isinstance(lm, str | Path):
        return _load_model(lm)
    raise ParameterError(f"expected a model or a model file, got {type(lm).__name__}",
                         field="lm")


def _where(nbest: object) -> str:
    return str(nbest) if isinstance(nbest, str | Path) else _MEMORY


def _items(nbest: NBest, require_references: bool = False) -> list[tuple[int, Utterance]]:
    if isinstance(nbest, str | Path):
        return list(iter_nbest(nbest, require_references=require_references))
    if isinstance(nbest, str) or not isinstance(nbest, Sequence):
        raise ParameterError(f"expected a file or a list of utterances, got "
                             f"{type(nbest).__name__}", field="nbest")
    # a str was read as a path above
    utterances: Sequence[Utterance] = nbest  # type: ignore[assignment]
    return list(enumerate(utterances, 1))


def _matrix(nbest: NBest, lms: Mapping[str, LanguageModel], features: Sequence[str], *,
            with_errors: bool) -> FeatureMatrix:
    items = _items(nbest, require_references=with_errors)
    if not items:
        raise ParameterError("no utterances", field="nbest")
    return build_matrix(items, path=_where(nbest), lms=lms, features=features,
                        with_errors=with_errors).matrix
