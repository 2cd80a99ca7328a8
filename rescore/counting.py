"""What is counted and how: the unit (words, or characters for scripts written without
spaces) and the scoring rules (:mod:`rescore.rules`), held together as one :class:`Counting`.

Every command that counts errors or scores text with an LM takes one. The default, words
under no rules file, is exactly the plain behaviour of :mod:`rescore.text` and
:mod:`rescore.wer`, and records nothing in provenance (so files written without
``--rules`` or ``--unit`` keep their bytes).

With ``unit="char"`` a text's tokens are the characters of its normalised words, spaces
dropped: ``"ポンプ 三"`` gives ``["ポ", "ン", "プ", "三"]``. The same tokens feed the LM (a
character n-gram model), the insertion penalty (a character count) and the error count,
so the error rate is the character error rate of the texts with their spaces removed,
``jiwer.cer("".join(ref_words), "".join(hyp_words))``.

The unit alone lives in :mod:`rescore.units` (what the language-model commands need,
without the rules' pydantic models and the aligner).
"""

from __future__ import annotations

from collections.abc import Mapping, Sequence
from dataclasses import dataclass
from pathlib import Path
from typing import Any

from rescore.align import CompiledRules, align_with_rules
from rescore.errors import InputError, ParameterError
from rescore.rules import RulesFile, load_rules
from rescore.text import tokens, tokens_many
from rescore.units import (
    UNIT_KEY,
    WORD,
    Unit,
    characters,
    check_model_unit,
    parse_unit,
    plural,
    unit_provenance,
)
from rescore.wer import (
    Alignment,
    UtteranceCounts,
    align_many,
    counts_from_alignments,
    utterance_counts,
    word_errors,
)

# provenance key of the rules (present only when not the default: no rules file)
RULES_KEY = "rules"


@dataclass(frozen=True)
class Counting:
    """The unit and the scoring rules of one run (the default: words, no rules file)."""

    unit: Unit = WORD
    rules: RulesFile | None = None

    @property
    def plain(self) -> bool:
        """True for today's counting: words, the default normalisation, no rules."""
        return self.unit == WORD and self.rules is None

    # --- tokens --------------------------------------------------------------------------

    def lm_tokens(self, text: str) -> list[str]:
        """The tokens an LM scores: the normalised words, or their characters."""
        words = tokens(text)
        return characters(words) if self.unit == "char" else words

    def lm_tokens_many(self, texts: Sequence[str]) -> Sequence[list[str]]:
        words = tokens_many(texts)
        return [characters(w) for w in words] if self.unit == "char" else words

    def score_tokens(self, text: str) -> list[str]:
        """The tokens errors are counted on: the rules' normalisation with their ignored
        tokens gone (the plain normalisation without rules), as characters for ``char``."""
        words = tokens(text) if self.rules is None else self.rules.rules.words(text)
        return characters(words) if self.unit == "char" else words

    # --- alignment and errors ------------------------------------------------------------

    def align_many(self, refs: Sequence[Sequence[str]], hyps: Sequence[Sequence[str]]
                   ) -> list[Alignment]:
        """Alignments of scored tokens (:meth:`score_tokens`) paired by position."""
        if self.rules is None:
            return align_many(refs, hyps)
        return align_with_rules(refs, hyps, self.rules.rules, unit=self.unit)

    def counts(self, refs: Sequence[str], hyps: Sequence[str]) -> UtteranceCounts:
        """Per-utterance counts of texts paired by position (plain: exactly today's)."""
        ref_t = [self.score_tokens(t) for t in refs]
        hyp_t = [self.score_tokens(t) for t in hyps]
        if self.rules is None:
            return utterance_counts(ref_t, hyp_t)
        return counts_from_alignments(self.align_many(ref_t, hyp_t))

    def errors(self, ref: Sequence[str], hyp: Sequence[str]) -> int:
        """The errors of one hypothesis (the edit distance without rules)."""
        if self.rules is None or not self.rules.rules.changes_alignment:
            return word_errors(ref, hyp)
        compiled = self._compiled()
        if not compiled.touches(ref, hyp):
            return word_errors(ref, hyp)
        return compiled.align(ref, hyp).errors

    def _compiled(self) -> CompiledRules:
        assert self.rules is not None
        cached: CompiledRules | None = self.__dict__.get("_compiled_rules")
        if cached is None:
            cached = CompiledRules.of(self.rules.rules, unit=self.unit)
            object.__setattr__(self, "_compiled_rules", cached)
        return cached

    # --- provenance ----------------------------------------------------------------------

    def provenance(self) -> dict[str, Any]:
        """``{"unit": ..., "rules": {name, sha256, path}}``, each only when not the default."""
        out = unit_provenance(self.unit)
        if self.rules is not None:
            out[RULES_KEY] = self.rules.provenance()
        return out

    def check_record(self, record: Mapping[str, Any] | None, what: str, *,
                     path: str | Path | None = None, rules: bool = True) -> None:
        """Refuse a record (a provenance) counted at another unit or, with ``rules``,
        under other scoring rules.

        ``what`` names the record in the message (``the weights``). A record without a
        unit was counted in words; one without rules under no rules file.
        """
        unit, sha = record_counting(record)
        if unit != self.unit:
            raise InputError(f"{what} were counted in {plural(unit)}, this run counts "
                             f"{plural(self.unit)}; give --unit {unit}, or files made "
                             f"with --unit {self.unit}", path=path, field=UNIT_KEY)
        mine = None if self.rules is None else self.rules.sha256
        if rules and sha != mine:
            raise InputError(f"{what} were scored under {describe_rules(record)}, this run "
                             f"under {self.describe_rules()}; score both under the same "
                             "--rules file", path=path, field=RULES_KEY)

    def check_model(self, model: object, *, path: str | Path) -> None:
        """Refuse a model trained on another token unit than this run's
        (:func:`rescore.units.check_model_unit`)."""
        check_model_unit(model, self.unit, path=path)

    def check_choice(self, choose: str | None) -> None:
        """Refuse a choice rule that works on space-separated words (``min-risk``,
        ``consensus``) under the character unit: a text written without spaces is one
        "word" to them, so they would choose whole sentences while the errors count
        characters."""
        if self.unit == "char" and choose not in (None, "best"):
            raise ParameterError(f"the choice rule {choose} works on space-separated words; "
                                 "with unit char choose best", field="choose")

    def describe_rules(self) -> str:
        if self.rules is None:
            return "no rules file"
        return f"rules {self.rules.name!r} (SHA-256 {self.rules.sha256[:12]})"


def record_counting(record: Mapping[str, Any] | None) -> tuple[str, str | None]:
    """(unit, rules SHA-256 or None) of a provenance record; absent keys are the default."""
    record = record or {}
    unit = record.get(UNIT_KEY, WORD)
    rules = record.get(RULES_KEY)
    sha = rules.get("sha256") if isinstance(rules, Mapping) else None
    return str(unit), None if sha is None else str(sha)


def describe_rules(record: Mapping[str, Any] | None) -> str:
    rules = (record or {}).get(RULES_KEY)
    if not isinstance(rules, Mapping):
        return "no rules file"
    return f"rules {rules.get('name')!r} (SHA-256 {str(rules.get('sha256'))[:12]})"


PLAIN = Counting()


def counting_of(rules: str | Path | None = None, unit: str = WORD) -> Counting:
    """The counting of a run from a rules file's path (read and validated) and a unit."""
    return Counting(parse_unit(unit), None if rules is None else load_rules(rules))
