"""Several recognizers' N-best lists of the same utterances merged into one list each.

Hypotheses are merged when their normalised words are equal (:func:`rescore.text.tokens`).
Every merged hypothesis carries, for each system ``S``, ``acoustic:S`` and ``FEATURE:S``
for each feature ``S`` gave, plus ``missing:S`` (1.0 when ``S`` did not produce this
hypothesis, else 0.0), so that tuning learns the systems' weights like any other feature.

Rules:
- **Missing score.** A hypothesis that system ``S`` did not put in its list for an
  utterance gets, for each of ``S``'s scores, the lowest value ``S`` gave any hypothesis of
  that list (it was at best as good as the worst one ``S`` kept; scores are read as
  higher-is-better, as the N-best format's ``acoustic`` is) and ``missing:S = 1``. A
  feature that ``S`` gave none of the list's hypotheses is 0.0.
- **Duplicates within one system** (equal after normalisation): the one with the highest
  acoustic score speaks for the system (the first of equals).
- **Ids in only some systems:** ``partial="refuse"`` (the default) raises
  :class:`~rescore.errors.InputError` naming the id and the systems that lack it;
  ``partial="keep"`` keeps the utterance, and every score of a system that lacks it is 0.0
  with ``missing:S = 1`` on every hypothesis: a constant within the list, which changes
  neither the choice nor the posteriors. Kept ids are listed in ``Combined.partial``.
  Nothing is dropped silently.
- ``acoustic`` of a merged hypothesis is the mean of ``acoustic:S`` over the systems that
  decoded the utterance (an equal-weight vote before tuning); its ``text`` the first
  spelling met. ``reference`` comes from the first system that has one, and systems whose
  references differ after normalisation are an error; ``meta`` from the first system.
- Order: utterances as in the first system, then ids found only in later ones in the order
  met; hypotheses in order of first appearance, systems in the order given.
"""

from __future__ import annotations

from collections.abc import Sequence
from dataclasses import dataclass
from typing import Any, Literal

from rescore.errors import InputError
from rescore.nbest import Hypothesis, Utterance
from rescore.text import tokens

Partial = Literal["refuse", "keep"]
ACOUSTIC = "acoustic"
MISSING = "missing"


def system_feature(name: str, system: str) -> str:
    """The merged list's name of score ``name`` of ``system`` (``acoustic:A``)."""
    return f"{name}:{system}"


@dataclass(frozen=True)
class Combined:
    """The merged utterances, the systems in order, and the ids some systems lacked
    (``(id, (systems lacking it, ...))``, kept under ``partial="keep"``)."""

    utterances: tuple[Utterance, ...]
    systems: tuple[str, ...]
    partial: tuple[tuple[str, tuple[str, ...]], ...]


def _index(system: str, utterances: Sequence[Utterance]) -> dict[str, Utterance]:
    out: dict[str, Utterance] = {}
    for utt in utterances:
        if utt["id"] in out:
            raise InputError(f"id {utt['id']!r} appears twice in system {system!r}",
                             field="id")
        out[utt["id"]] = utt
    return out


def _scores(hyp: Hypothesis) -> dict[str, float]:
    return {ACOUSTIC: float(hyp["acoustic"]),
            **{k: float(v) for k, v in hyp.get("features", {}).items()}}


def _system_view(utt: Utterance) -> dict[str, dict[str, float]]:
    """Normalised text -> scores, the highest acoustic score speaking for duplicates."""
    view: dict[str, dict[str, float]] = {}
    for hyp in utt["hypotheses"]:
        key = " ".join(tokens(hyp["text"]))
        scores = _scores(hyp)
        if key not in view or scores[ACOUSTIC] > view[key][ACOUSTIC]:
            view[key] = scores
    return view


def _merge_one(uid: str, present: list[tuple[str, Utterance]], systems: Sequence[str],
               ) -> Utterance:
    spelling: dict[str, str] = {}
    views: dict[str, dict[str, dict[str, float]]] = {}
    for system, utt in present:
        views[system] = _system_view(utt)
        for hyp in utt["hypotheses"]:
            spelling.setdefault(" ".join(tokens(hyp["text"])), hyp["text"])
    floors: dict[str, dict[str, float]] = {}
    for system, view in views.items():
        names = sorted({n for scores in view.values() for n in scores})
        floors[system] = {n: min(s[n] for s in view.values() if n in s) for n in names}
    hyps: list[Hypothesis] = []
    for key, text in spelling.items():
        features: dict[str, float] = {}
        acoustic: list[float] = []
        for system in systems:
            if system not in views:
                features[system_feature(ACOUSTIC, system)] = 0.0
                features[system_feature(MISSING, system)] = 1.0
                continue
            own = views[system].get(key)
            for name, floor in floors[system].items():
                value = floor if own is None or name not in own else own[name]
                features[system_feature(name, system)] = value
            features[system_feature(MISSING, system)] = 0.0 if own is not None else 1.0
            acoustic.append(features[system_feature(ACOUSTIC, system)])
        hyps.append({"text": text, "acoustic": sum(acoustic) / len(acoustic),
                     "features": features})
    out: dict[str, Any] = {"id": uid, "hypotheses": hyps}
    refs = [(s, u["reference"]) for s, u in present if "reference" in u]
    if refs:
        first = tokens(refs[0][1])
        for system, ref in refs[1:]:
            if tokens(ref) != first:
                raise InputError(f"id {uid!r}: systems {refs[0][0]!r} and {system!r} give "
                                 "different references", field="reference")
        out["reference"] = refs[0][1]
    if "meta" in present[0][1]:
        out["meta"] = present[0][1]["meta"]
    merged: Utterance = out  # type: ignore[assignment]
    return merged


def combine_lists(systems: Sequence[tuple[str, Sequence[Utterance]]], *,
                  partial: Partial = "refuse") -> Combined:
    """Merge each utterance's lists from several systems into one list.

    Parameters
    ----------
    systems : ``(name, utterances)`` per system, in order; names non-empty and distinct.
    partial : ``"refuse"`` or ``"keep"``: what to do with an id that some systems lack.

    Returns
    -------
    Combined

    Raises
    ------
    InputError
        An id twice in one system, an id missing from some systems under
        ``partial="refuse"``, or references that disagree.
    ValueError
        Fewer than two systems, bad names or an unknown ``partial``.
    """
    names = [name for name, _ in systems]
    if len(names) < 2:
        raise ValueError("combining needs at least two systems")
    if len(set(names)) != len(names) or not all(names):
        raise ValueError(f"system names must be non-empty and distinct: {names}")
    if partial not in ("refuse", "keep"):
        raise ValueError(f"unknown partial policy {partial!r}; expected refuse or keep")
    indexed = [(name, _index(name, utts)) for name, utts in systems]
    order: dict[str, None] = {}
    for _, index in indexed:
        order.update(dict.fromkeys(index))
    merged: list[Utterance] = []
    kept: list[tuple[str, tuple[str, ...]]] = []
    for uid in order:
        present = [(name, index[uid]) for name, index in indexed if uid in index]
        lacking = tuple(name for name, index in indexed if uid not in index)
        if lacking:
            if partial == "refuse":
                raise InputError(f"id {uid!r} is missing from system(s) "
                                 f"{', '.join(lacking)} (keep such ids with their scores "
                                 "marked missing, or give every system the same ids)",
                                 field="id")
            kept.append((uid, lacking))
        merged.append(_merge_one(uid, present, names))
    return Combined(utterances=tuple(merged), systems=tuple(names), partial=tuple(kept))
