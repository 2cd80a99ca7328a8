"""The unit of counting (words or characters) and the scoring rules, as every command uses
them: CER against jiwer, hand-worked cases with the alignment drawn, provenance and the
refusals of mixed units and rules."""

from __future__ import annotations

import json
import math
from pathlib import Path

import jiwer
import pytest
from hypothesis import given
from hypothesis import strategies as st

from rescore import word_error_rate
from rescore.counting import PLAIN, Counting, counting_of
from rescore.errors import InputError, ParameterError
from rescore.lm import NGramModel, load_model, save_model
from rescore.lm.corpus import char_sentences
from rescore.rules import parse_rules
from rescore.text import tokens
from rescore.units import characters, parse_unit
from rescore.wer import counts_from_alignments, summarise, utterance_counts
from tests.conftest import run

CHARS = Counting("char")

# letters of scripts written without spaces, and of others beside them
CJK = "三号泵已关闭开温度ポンプ止める"
THAI = "ปั๊มสามปิดเปิดอุณหภูมิ"
LATIN = "abcé"
HANGUL = "펌프세닫힘"
alphabet = st.sampled_from(list(CJK + THAI + LATIN + HANGUL + " "))
texts = st.text(alphabet=alphabet, max_size=12)


def cer_of(counting: Counting, refs: list[str], hyps: list[str]) -> float:
    r = [counting.score_tokens(t) for t in refs]
    h = [counting.score_tokens(t) for t in hyps]
    counts = utterance_counts(r, h) if counting.rules is None \
        else counts_from_alignments(counting.align_many(r, h))
    return summarise(counts).wer


@given(st.lists(st.tuples(texts, texts), min_size=1, max_size=5))
def test_char_unit_is_jiwer_cer_without_spaces(pairs: list[tuple[str, str]]) -> None:
    # source: jiwer.cer (reference library) on the same normalised strings, spaces dropped:
    # the corpus CER is total character edits over total reference characters
    refs = [r for r, _ in pairs]
    hyps = [h for _, h in pairs]
    ref_s = ["".join(tokens(t)) for t in refs]
    hyp_s = ["".join(tokens(t)) for t in hyps]
    kept = [(r, h) for r, h in zip(ref_s, hyp_s, strict=True) if r]
    if not kept:
        return  # jiwer refuses empty references; our rule for those is tested apart
    if len(kept) < len(ref_s):
        refs = [r for r, s in zip(refs, ref_s, strict=True) if s]
        hyps = [h for h, s in zip(hyps, ref_s, strict=True) if s]
    expected = jiwer.cer([r for r, _ in kept], [h for _, h in kept])
    assert cer_of(CHARS, refs, hyps) == pytest.approx(expected)


def test_char_tokens_drop_the_spaces() -> None:
    # by hand: the normalised words "ポンプ" and "三" give four characters
    assert CHARS.score_tokens("ポンプ 三") == ["ポ", "ン", "プ", "三"]
    assert CHARS.lm_tokens("Ab, c") == ["a", "b", "c"]
    assert characters(["ab", "c"]) == ["a", "b", "c"]


def test_char_unit_hand_worked() -> None:
    # by hand:  ポ ン プ 三 止
    #           ポ ン プ 二 止   -> 1 substitution of 5 reference characters: CER 0.2
    # the same line as words ("ポンプ三止" is one word) is 1 substitution of 1: WER 1.0
    assert cer_of(CHARS, ["ポンプ三止"], ["ポンプ二止"]) == pytest.approx(0.2)
    assert cer_of(PLAIN, ["ポンプ三止"], ["ポンプ二止"]) == 1.0


def test_thai_combining_marks_are_characters_of_their_own() -> None:
    # Thai vowel and tone marks are combining code points (category Mn): the character
    # unit counts code points, as jiwer.cer does. by hand:
    #   ป ั ๊ ม
    #   ป ั   ม     -> the tone mark U+0E4A deleted: 1 error of 4
    assert cer_of(CHARS, ["ปั๊ม"], ["ปัม"]) == pytest.approx(0.25)
    assert jiwer.cer("ปั๊ม", "ปัม") == pytest.approx(0.25)  # source: jiwer, the same string


def test_rules_with_the_char_unit_work_on_characters() -> None:
    # equivalent ["三", "3"] and optional "えー" (two characters, one optional step):
    #   え ー ポ ン プ 三        reference: 6 characters
    #   *  *  ポ ン プ 3         -> optional skipped (2 hits), ポンプ (3), 三 ~ 3 (1): 6 hits
    rules = parse_rules("equivalent = [['三', '3']]\noptional = ['えー']\n".encode(), "jp.toml")
    counting = Counting("char", rules)
    ref, hyp = counting.score_tokens("えー ポンプ三"), counting.score_tokens("ポンプ3")
    al = counting.align_many([ref], [hyp])[0]
    assert [(op.kind, op.ref, op.hyp) for op in al.ops] == [
        ("optional", "え ー", None), ("equal", "ポ", "ポ"), ("equal", "ン", "ン"),
        ("equal", "プ", "プ"), ("equivalent", "三", "3")]
    assert al.counts() == (0, 0, 0, 6)
    assert counting.errors(ref, hyp) == 0
    assert Counting("char").errors(ref, hyp) == 3  # without rules: 2 deletions, 1 substitution


def test_rules_ignore_goes_before_the_characters() -> None:
    # "[noise]" is dropped as a token, then the rest becomes characters (no "n", "o", ...)
    counting = Counting("char", parse_rules(b"ignore = ['[noise]']\n", "r.toml"))
    assert counting.score_tokens("[noise] ab c") == ["a", "b", "c"]


def test_provenance_is_empty_by_default() -> None:
    # common practice here: a default run writes the bytes it wrote before the option existed
    assert PLAIN.provenance() == {}
    rules = parse_rules(b"optional = ['um']\n", "desk.toml")
    assert Counting("char", rules).provenance() == {
        "unit": "char", "rules": {"name": "desk", "sha256": rules.sha256, "path": "desk.toml"}}


def test_mixed_units_and_rules_are_refused_with_one_line() -> None:
    rules = parse_rules(b"optional = ['um']\n", "desk.toml")
    with pytest.raises(InputError, match=r"w\.json: unit: the weights were counted in "
                       r"characters, this run counts words; give --unit char"):
        PLAIN.check_record({"unit": "char"}, "the weights", path="w.json")
    with pytest.raises(InputError, match=r"scored under no rules file, this run under rules "
                       r"'desk'"):
        Counting(rules=rules).check_record({}, "the tuning record's errors")
    Counting(rules=rules).check_record({"rules": rules.provenance()}, "x")  # same: accepted
    PLAIN.check_record({"rules": rules.provenance()}, "x", rules=False)  # apply: unit only
    with pytest.raises(ParameterError, match="unknown unit 'chars'; expected word or char"):
        parse_unit("chars")


def test_counting_of_reads_the_rules_file(tmp_path: Path) -> None:
    path = tmp_path / "desk.toml"
    path.write_bytes(b"name = 'desk-v1'\n")
    got = counting_of(path, "word")
    assert got.rules is not None and got.rules.name == "desk-v1" and not got.plain


# --- the commands -------------------------------------------------------------------------

def _tsv(path: Path, lines: list[str]) -> Path:
    path.write_text("".join(f"u{i}\t{t}\n" for i, t in enumerate(lines)), encoding="utf-8")
    return path


def test_wer_rules_on_the_command_line(tmp_path: Path) -> None:
    # by hand, with ["ok", "okay"] equivalent and "um" optional:
    #   um  ok    vent  bay  three
    #   *   okay  vent  day  three   -> 1 substitution (bay/day) of 5 words: 0.2
    # without the rules: 1 deletion, 2 substitutions: 0.6
    refs = _tsv(tmp_path / "refs.tsv", ["um ok vent bay three"])
    hyps = _tsv(tmp_path / "hyps.tsv", ["okay vent day three"])
    rules = tmp_path / "desk.toml"
    rules.write_bytes(b"equivalent = [['ok', 'okay']]\noptional = ['um']\n")
    plain = run(["wer", "--refs", refs, "--hyps", hyps, "--json"])
    ruled = run(["wer", "--refs", refs, "--hyps", hyps, "--json", "--rules", rules])
    assert plain.exit_code == 0 and ruled.exit_code == 0, ruled.stderr
    assert json.loads(plain.stdout)["wer"] == pytest.approx(0.6)
    assert "rules" not in json.loads(plain.stdout) and "unit" not in json.loads(plain.stdout)
    data = json.loads(ruled.stdout)
    assert data["wer"] == pytest.approx(0.2) and data["hits"] == 4
    assert data["rules"]["name"] == "desk" and len(data["rules"]["sha256"]) == 64


def test_wer_char_unit_on_the_command_line(tmp_path: Path) -> None:
    refs = _tsv(tmp_path / "refs.tsv", ["三号泵 已关闭", "ปั๊มสาม ปิด"])
    hyps = _tsv(tmp_path / "hyps.tsv", ["三号泵已开闭", "ปั๊มสามปิด"])
    got = run(["wer", "--refs", refs, "--hyps", hyps, "--json", "--unit", "char"])
    assert got.exit_code == 0, got.stderr
    # source: jiwer.cer of the normalised texts with their spaces removed
    expected = jiwer.cer(["三号泵已关闭", "ปั๊มสามปิด"], ["三号泵已开闭", "ปั๊มสามปิด"])
    data = json.loads(got.stdout)
    assert data["wer"] == pytest.approx(expected) and data["unit"] == "char"
    assert data["reference_words"] == 6 + 10  # characters, by hand (Thai marks included)
    shown = run(["wer", "--refs", refs, "--hyps", hyps, "--unit", "char"])
    assert "CER" in shown.stdout and "WER" not in shown.stdout
    bad = run(["wer", "--refs", refs, "--hyps", hyps, "--unit", "chars"])
    assert bad.exit_code == 2 and "--unit: unknown unit 'chars'" in bad.stderr


def test_bad_rules_file_is_one_line(tmp_path: Path) -> None:
    refs = _tsv(tmp_path / "refs.tsv", ["a b"])
    rules = tmp_path / "bad.toml"
    rules.write_bytes(b"optinal = ['um']\n")
    got = run(["wer", "--refs", refs, "--hyps", refs, "--rules", rules])
    assert got.exit_code == 1
    assert got.stderr.strip().splitlines() == [
        f"error: {rules}:1: optinal: unknown key; expected one of name, normalise, "
        "keep_punctuation, equivalent, optional, ignore"]


def _char_lm(tmp_path: Path, text: list[str], *options: str) -> Path:
    corpus = tmp_path / "train.txt"
    corpus.write_text("\n".join(text) + "\n", encoding="utf-8")
    model = tmp_path / "char.lm"
    got = run(["lm", "build", corpus, *(options or ("--order", "1", "--method", "mle")),
               "--unit", "char", "-o", model])
    assert got.exit_code == 0, got.stderr
    return model


def test_char_model_records_its_unit_and_scores_characters(tmp_path: Path) -> None:
    # by hand, a maximum-likelihood unigram model of "aab" (tokens a, a, b, </s>):
    # P(a) = 2/4, P(b) = 1/4, P(</s>) = 1/4 (source: the MLE unigram, count over tokens,
    # </s> counted as a token, from memory); the text "ab" scores
    # log10(1/2) + log10(1/4) + log10(1/4) over 3 tokens
    model = _char_lm(tmp_path, ["a ab"])
    test = tmp_path / "test.txt"
    test.write_text("ab\n", encoding="utf-8")
    got = run(["lm", "perplexity", model, test, "--unit", "char", "--json"])
    assert got.exit_code == 0, got.stderr
    data = json.loads(got.stdout)
    expected = math.log10(0.5) + 2 * math.log10(0.25)
    assert data["tokens"] == 3 and data["log10_prob"] == pytest.approx(expected)
    # per sentence: one line each, blank lines skipped but counted in the line numbers
    test.write_text("ab\n\nb a\n", encoding="utf-8")
    scores = tmp_path / "scores.jsonl"
    got = run(["lm", "perplexity", model, test, "--unit", "char", "--json",
               "--per-sentence", scores])
    assert got.exit_code == 0, got.stderr
    rows = [json.loads(line) for line in scores.read_text().splitlines()]
    assert [(r["line"], r["text"], r["words"], r["tokens"]) for r in rows] == [
        (1, "ab", 2, 3), (3, "b a", 2, 3)]
    # "ba" by hand: log10(1/4) + log10(1/2) + log10(1/4), the same sum as "ab"
    assert rows[1]["log10_prob"] == pytest.approx(expected)
    assert json.loads(got.stdout)["log10_prob"] == pytest.approx(2 * expected)
    # the word unit refuses the character model, naming the fix
    word = run(["lm", "perplexity", model, test])
    assert word.exit_code == 1
    assert "the model was built on characters (lm build --unit char) but this run counts " \
        "words; give --unit char" in word.stderr


def _nbest(path: Path, rows: list[tuple[str, str, list[tuple[str, float]]]]) -> Path:
    with path.open("w", encoding="utf-8") as fh:
        for uid, ref, hyps in rows:
            fh.write(json.dumps({"id": uid, "reference": ref, "hypotheses": [
                {"text": t, "acoustic": a} for t, a in hyps]}, ensure_ascii=False) + "\n")
    return path


def test_tune_and_apply_at_the_char_unit(tmp_path: Path) -> None:
    # the LM knows "ポンプ止"; the recognizer prefers a look-alike by a little acoustic score
    model = _char_lm(tmp_path, ["ポンプ止", "ポンプ止", "ポンプ三止", "ボ"], "--order", "2")
    rows = [(f"u{i}", "ポンプ止", [("ボンプ止", -10.0), ("ポンプ止", -10.5)]) for i in range(4)]
    dev = _nbest(tmp_path / "dev.jsonl", rows)
    weights = tmp_path / "w.json"
    got = run(["tune", dev, "--lm", model, "--unit", "char", "-o", weights, "--json",
               "--folds", "0"])
    assert got.exit_code == 0, got.stderr
    data = json.loads(got.stdout)
    # 1 substitution of 4 characters in each utterance before, none once the LM weighs in
    assert data["one_best_wer"] == pytest.approx(0.25) and data["dev_wer"] == 0.0
    assert data["unit"] == "char"
    assert json.loads(weights.read_text())["provenance"]["unit"] == "char"
    out = tmp_path / "out.jsonl"
    refused = run(["apply", dev, "--lm", model, "--weights", weights, "-o", out])
    assert refused.exit_code == 1 and not out.exists()
    assert "the weights were counted in characters, this run counts words" in refused.stderr
    ok = run(["apply", dev, "--lm", model, "--weights", weights, "-o", out, "--unit", "char"])
    assert ok.exit_code == 0, ok.stderr
    first = json.loads(out.read_text(encoding="utf-8").splitlines()[0])
    # the word_count column counts characters under --unit char (4 each)
    assert first["best"] == 1 and first["hypotheses"][0]["word_count"] == 4


def test_check_with_rules_counts_the_oracle_under_them(tmp_path: Path) -> None:
    # by hand, "um" optional: the 1-best "vent bay" of "um vent bay" has no error
    nbest = _nbest(tmp_path / "n.jsonl", [("u0", "um vent bay", [("vent bay", -1.0)])])
    rules = tmp_path / "r.toml"
    rules.write_bytes(b"optional = ['um']\n")
    plain = json.loads(run(["check", nbest, "--json"]).stdout)
    ruled = json.loads(run(["check", nbest, "--json", "--rules", rules]).stdout)
    assert plain["one_best_wer"] == pytest.approx(1 / 3) and ruled["one_best_wer"] == 0.0


def test_unit_in_model_files(tmp_path: Path) -> None:
    # a word model's file says nothing of its unit (its bytes are those of before), and
    # reads as a word model; ARPA text cannot say, so a model read from it is taken as either
    words = NGramModel(order=2).fit([["pump", "two"], ["pump", "three"]])
    save_model(words, tmp_path / "w.lm")
    loaded = load_model(tmp_path / "w.lm")
    assert "unit" not in loaded.metadata and loaded.unit == "word"
    chars = NGramModel(order=2).fit(char_sentences([["ポンプ"], ["ポンプ", "三"]]))
    save_model(chars.mark_unit("char"), tmp_path / "c.lm")
    assert load_model(tmp_path / "c.lm").unit == "char"
    save_model(load_model(tmp_path / "c.lm"), tmp_path / "c.arpa")
    arpa = load_model(tmp_path / "c.arpa")
    assert arpa.unit is None
    PLAIN.check_model(arpa, path="c.arpa")
    CHARS.check_model(arpa, path="c.arpa")
    with pytest.raises(InputError, match="built on words"):
        CHARS.check_model(loaded, path="w.lm")


def test_python_api_counts_characters_and_rules(tmp_path: Path) -> None:
    # by hand: 三号泵 against 三号: one deletion of 3 characters
    assert word_error_rate(["三号泵"], ["三号"], unit="char").wer == pytest.approx(1 / 3)
    rules = tmp_path / "r.toml"
    rules.write_bytes(b"optional = ['um']\n")
    assert word_error_rate(["um vent"], ["vent"], rules=rules).wer == 0.0
    assert word_error_rate(["um vent"], ["vent"]).wer == 0.5


def test_word_choice_rules_are_refused_at_the_char_unit(tmp_path: Path) -> None:
    # min-risk and consensus compare space-separated words: a sentence written without
    # spaces is one word to them, so under --unit char they are refused, naming the flag
    nbest = _nbest(tmp_path / "n.jsonl", [("u0", "ポンプ", [("ポンプ", -1.0)])])
    model = _char_lm(tmp_path, ["ポンプ"], "--order", "2")
    got = run(["tune", nbest, "--lm", model, "--unit", "char", "--choose", "min-risk",
               "-o", tmp_path / "w.json"])
    assert got.exit_code == 2 and not (tmp_path / "w.json").exists()
    assert got.stderr.splitlines()[-1] == ("error: --choose: the choice rule min-risk works on "
                                           "space-separated words; with unit char choose best")


def test_lm_mix_refuses_a_character_model(tmp_path: Path) -> None:
    # the mixture weights are estimated on text read as words: a character model is refused
    model = _char_lm(tmp_path, ["ポンプ"], "--order", "2")
    got = run(["lm", "mix", model, model, "--fixed-weights", "0.5,0.5", "-o",
               tmp_path / "m.lm"])
    assert got.exit_code == 1 and not (tmp_path / "m.lm").exists()
    assert "the model was built on characters" in got.stderr


@given(st.lists(st.tuples(st.text(alphabet=st.sampled_from(list("ab ,")), max_size=8),
                          st.text(alphabet=st.sampled_from(list("ab ,")), max_size=8)),
                min_size=1, max_size=5))
def test_an_empty_rules_file_counts_as_no_rules(pairs: list[tuple[str, str]]) -> None:
    # an empty file is the plain rule: the same counts, utterance by utterance, as without
    # (and so jiwer's: source, tests/test_wer.py's checks of the plain counts against jiwer)
    empty = Counting(rules=parse_rules(b"", "empty.toml"))
    refs, hyps = [r for r, _ in pairs], [h for _, h in pairs]
    got, plain = empty.counts(refs, hyps), PLAIN.counts(refs, hyps)
    for name in ("substitutions", "deletions", "insertions", "hits"):
        assert getattr(got, name).tolist() == getattr(plain, name).tolist()


def test_tuned_under_rules_the_weights_go_with_those_rules(tmp_path: Path) -> None:
    corpus = tmp_path / "train.txt"
    corpus.write_text("vent bay three\nvent bay four\n", encoding="utf-8")
    model = tmp_path / "w.lm"
    assert run(["lm", "build", corpus, "--order", "2", "-o", model]).exit_code == 0
    nbest = _nbest(tmp_path / "dev.jsonl", [
        (f"u{i}", "um vent bay three", [("went bay three", -1.0), ("vent bay three", -1.2)])
        for i in range(3)])
    rules = tmp_path / "desk.toml"
    rules.write_bytes(b"optional = ['um']\n")
    weights = tmp_path / "weights.json"
    got = run(["tune", nbest, "--lm", model, "--rules", rules, "-o", weights, "--folds", "0",
               "--json"])
    assert got.exit_code == 0, got.stderr
    # by hand: "um" left out is no error, so the LM's choice makes no error at all
    assert json.loads(got.stdout)["dev_wer"] == 0.0
    recorded = json.loads(weights.read_text())["provenance"]["rules"]
    assert recorded["name"] == "desk" and recorded["sha256"] == \
        parse_rules(rules.read_bytes()).sha256
    out = tmp_path / "out.jsonl"
    assert run(["apply", nbest, "--lm", model, "--weights", weights, "-o", out]).exit_code == 0
    ok = run(["report", "--before", nbest, "--after", out, "--weights", weights, "--rules",
              rules, "-o", tmp_path / "r1", "--resamples", "100"])
    assert ok.exit_code == 0, ok.stderr
    refused = run(["report", "--before", nbest, "--after", out, "--weights", weights,
                   "-o", tmp_path / "r2", "--resamples", "100"])
    assert refused.exit_code == 1 and not (tmp_path / "r2").exists()
    assert "the weights' tuning errors were scored under rules 'desk'" in refused.stderr
    assert "this run under no rules file" in refused.stderr


def test_check_finds_references_in_a_character_models_text(tmp_path: Path) -> None:
    # the character model's training sentence "ポンプ止" is a test reference: found (the
    # fingerprints are of the character sentences the model was trained on)
    model = _char_lm(tmp_path, ["ポンプ止", "ポンプ三"], "--order", "2")
    nbest = _nbest(tmp_path / "n.jsonl", [("u0", "ポンプ止", [("ポンプ止", -1.0)]),
                                          ("u1", "ボンプ", [("ボンプ", -1.0)])])
    got = run(["check", nbest, "--lm", model, "--unit", "char", "--json"])
    assert got.exit_code == 0, got.stderr
    assert json.loads(got.stdout)["overlap"]["found"] == 1
