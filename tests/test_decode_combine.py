"""Merging several systems' N-best lists of the same utterances."""

from __future__ import annotations

import json
from pathlib import Path
from typing import Any

import numpy as np
import pytest

from rescore.decode.choice import decide
from rescore.decode.combine import combine_lists
from rescore.errors import InputError
from rescore.nbest import Utterance, iter_nbest, write_nbest
from rescore.text import tokens
from tests.conftest import run


def _utt(uid: str, hyps: list[tuple[str, float]], **extra: Any) -> Utterance:
    out: dict[str, Any] = {"id": uid, "hypotheses": [{"text": t, "acoustic": a}
                                                     for t, a in hyps], **extra}
    return out  # type: ignore[return-value]


def test_duplicates_merge_and_missing_scores_take_the_list_floor() -> None:
    # by hand: A says "Open vent" -10, "open went" -12; B says "open vent." -20,
    # "open then" -25. After normalisation "open vent" is in both: one hypothesis.
    # "open went" lacks a B score: B's floor for this list is -25 (its worst);
    # "open then" lacks an A score: A's floor is -12. acoustic = mean over systems.
    a = [_utt("u1", [("Open vent", -10.0), ("open went", -12.0)], reference="open vent")]
    b = [_utt("u1", [("open vent.", -20.0), ("open then", -25.0)])]
    got = combine_lists([("A", a), ("B", b)])
    (utt,) = got.utterances
    assert [h["text"] for h in utt["hypotheses"]] == ["Open vent", "open went", "open then"]
    feats = [h["features"] for h in utt["hypotheses"]]
    assert [f["acoustic:A"] for f in feats] == [-10.0, -12.0, -12.0]
    assert [f["acoustic:B"] for f in feats] == [-20.0, -25.0, -25.0]
    assert [f["missing:A"] for f in feats] == [0.0, 0.0, 1.0]
    assert [f["missing:B"] for f in feats] == [0.0, 1.0, 0.0]
    assert [h["acoustic"] for h in utt["hypotheses"]] == [-15.0, -18.5, -18.5]
    assert utt["reference"] == "open vent"
    assert got.partial == ()


def test_merged_lists_are_valid_nbest_records(tmp_path: Path) -> None:
    # the merged records must pass the project's own strict N-best reader (the contract's
    # format: finite scores, no unknown keys)
    a = [_utt("u1", [("go", -3.0), ("stop", -4.0)], reference="go", meta={"s": 1})]
    b = [_utt("u1", [("go now", -2.0)])]
    a[0]["hypotheses"][0]["features"] = {"first_pass_lm": -7.0}
    path = tmp_path / "merged.jsonl"
    write_nbest(path, combine_lists([("A", a), ("B", b)]).utterances)
    (back,) = [u for _, u in iter_nbest(path, require_references=True)]
    assert [h["text"] for h in back["hypotheses"]] == ["go", "stop", "go now"]
    # "stop" lacks A's first_pass_lm: the list floor, -7 (the only value A gave)
    assert back["hypotheses"][1]["features"]["first_pass_lm:A"] == -7.0
    assert back["meta"] == {"s": 1}


def test_features_are_named_per_system_and_within_system_duplicates_keep_the_best() -> None:
    a = [_utt("u1", [("go", -3.0), ("Go!", -1.0)])]
    a[0]["hypotheses"][0]["features"] = {"first_pass_lm": -7.0}
    a[0]["hypotheses"][1]["features"] = {"first_pass_lm": -9.0}
    b = [_utt("u1", [("stop", -2.0)])]
    (utt,) = combine_lists([("A", a), ("B", b)]).utterances
    first = utt["hypotheses"][0]["features"]
    # "Go!" (acoustic -1 beats -3) speaks for A, with its own feature value
    assert first["acoustic:A"] == -1.0 and first["first_pass_lm:A"] == -9.0
    assert "first_pass_lm:B" not in first


def test_partial_ids_are_refused_by_default() -> None:
    a = [_utt("u1", [("x", -1.0)]), _utt("u2", [("y", -1.0)])]
    b = [_utt("u1", [("x", -2.0)])]
    with pytest.raises(InputError, match="'u2' is missing from system"):
        combine_lists([("A", a), ("B", b)])


def test_partial_ids_kept_are_listed_and_constant_within_their_list() -> None:
    # an absent system's scores are 0.0 on every hypothesis of the list: a constant shift
    # of every total, which changes neither the choice nor the posteriors (softmax is
    # shift-invariant)
    a = [_utt("u1", [("x", -1.0)]), _utt("u2", [("y", -1.0), ("z", -4.0)])]
    b = [_utt("u1", [("x", -2.0)]), _utt("u3", [("w", -2.0)])]
    got = combine_lists([("A", a), ("B", b)], partial="keep")
    assert [u["id"] for u in got.utterances] == ["u1", "u2", "u3"]
    assert got.partial == (("u2", ("B",)), ("u3", ("A",)))
    u2 = got.utterances[1]["hypotheses"]
    assert {h["features"]["acoustic:B"] for h in u2} == {0.0}
    assert {h["features"]["missing:B"] for h in u2} == {1.0}
    assert [h["acoustic"] for h in u2] == [-1.0, -4.0]


def test_disagreeing_references_and_repeated_ids_are_errors() -> None:
    a = [_utt("u1", [("x", -1.0)], reference="open vent")]
    b = [_utt("u1", [("x", -1.0)], reference="close vent")]
    with pytest.raises(InputError, match="different references"):
        combine_lists([("A", a), ("B", b)])
    with pytest.raises(InputError, match="twice"):
        combine_lists([("A", a + a), ("B", b)])
    with pytest.raises(ValueError):
        combine_lists([("A", a)])


def test_voting_three_systems_with_independent_errors_beats_each() -> None:
    # Fiscus 1997's premise (voting over aligned system outputs), worked by hand: three
    # systems, one hypothesis each, one substitution per utterance at a different word.
    # Each missing score takes the list floor, which for a one-hypothesis system is its
    # own score, so every merged hypothesis gets the same total (-30) and posterior 1/3;
    # in every confusion bin two systems outvote the third, giving back the reference.
    refs = ["turn the lights on", "vent bay three open"]
    outputs = {"A": ["turn a lights on", "vent bay tree open"],
               "B": ["turn the light on", "went bay three open"],
               "C": ["turn the lights in", "vent bay three opened"]}
    systems = [(name, [_utt(f"u{k}", [(text, -10.0)], reference=ref)
                       for k, (text, ref) in enumerate(zip(texts, refs, strict=True))])
               for name, texts in outputs.items()]
    merged = combine_lists(systems).utterances
    hyps = [tokens(h["text"]) for u in merged for h in u["hypotheses"]]
    offsets = np.concatenate([[0], np.cumsum([len(u["hypotheses"]) for u in merged])])
    totals = np.array([sum(h["features"][f"acoustic:{s}"] for s in outputs)
                       for u in merged for h in u["hypotheses"]])
    np.testing.assert_array_equal(totals, -30.0)
    got = decide(hyps, offsets, totals, scale=1.0, rule="consensus")
    assert got.texts() == refs
    for texts in outputs.values():  # each system alone: one error per utterance
        assert all(t != r for t, r in zip(texts, refs, strict=True))
    np.testing.assert_allclose(got.confidences[0], [1.0, 2 / 3, 2 / 3, 2 / 3])


def test_combine_json_counts_what_it_wrote(tmp_path: Path) -> None:
    # --json: the utterances, systems and hypotheses of the written file, and the kept
    # partial ids with the systems they lack
    a, b = tmp_path / "A.jsonl", tmp_path / "B.jsonl"
    write_nbest(a, [{"id": "u1", "hypotheses": [{"text": "vent open", "acoustic": -1.0}]},
                    {"id": "u2", "hypotheses": [{"text": "row two", "acoustic": -2.0}]}])
    write_nbest(b, [{"id": "u1", "hypotheses": [{"text": "vent opened", "acoustic": -1.5}]}])
    out = tmp_path / "c.jsonl"
    res = run(["combine", a, b, "-o", out, "--partial", "keep", "--json"])
    assert res.exit_code == 0, res.stderr
    data = json.loads(res.stdout)
    written = [json.loads(line) for line in out.read_text().splitlines()]
    assert data["utterances"] == len(written) == 2 and data["systems"] == ["A", "B"]
    assert data["hypotheses"] == sum(len(u["hypotheses"]) for u in written) == 3
    assert data["partial"] == [{"id": "u2", "missing": ["B"]}]
