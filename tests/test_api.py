"""The public Python API: the README's "Python" block runs as it stands and prints the
test WER the command line gives for the same steps; each public name is documented."""

from __future__ import annotations

import contextlib
import io
import json
import os
import re
from pathlib import Path

import pytest

import rescore
from tests.conftest import run

ROOT = Path(__file__).resolve().parent.parent
DEMO = ROOT / "fixtures" / "demo"


def _python_block() -> str:
    text = (ROOT / "README.md").read_text(encoding="utf-8")
    section = text[text.index("## Python\n"):]
    return re.search(r"```python\n(.*?)```", section, re.S).group(1)  # type: ignore[union-attr]


@pytest.fixture(scope="module")
def readme_output() -> str:
    out = io.StringIO()
    cwd = os.getcwd()
    try:
        os.chdir(ROOT)  # the block names the demo data relative to the project folder
        with contextlib.redirect_stdout(out):
            exec(compile(_python_block(), "README.md", "exec"), {})
    finally:
        os.chdir(cwd)
    return out.getvalue()


def test_readme_block_prints_the_command_line_test_wer(readme_output: str,
                                                       tmp_path: Path) -> None:
    model, weights, out = tmp_path / "m.lm", tmp_path / "w.json", tmp_path / "out.jsonl"
    assert run(["lm", "build", DEMO / "train.txt", "--order", "3", "-o", model]).exit_code == 0
    assert run(["tune", DEMO / "dev.jsonl", "--lm", model, "--search", "grid",
                "-o", weights]).exit_code == 0
    assert run(["apply", DEMO / "test.jsonl", "--lm", model, "--weights", weights,
                "-o", out]).exit_code == 0
    cli_wer = json.loads(run(["wer", out, "--json"]).stdout)["wer"]
    assert f"test WER {100 * cli_wer:.2f}%" in readme_output
    tuned = json.loads(weights.read_text())
    assert f"LM weight {tuned['lm_weight']:g}," in readme_output


def test_wer_of_texts_against_jiwer() -> None:
    jiwer = pytest.importorskip("jiwer")
    refs, hyps = ["the pump is on", "vent open"], ["the pump on", "vent is open"]
    # jiwer: 1 deletion + 1 insertion over 6 reference words
    assert rescore.word_error_rate(refs, hyps).wer == pytest.approx(jiwer.wer(refs, hyps))


def test_parameter_error_names_the_parameter() -> None:
    with pytest.raises(rescore.ParameterError) as caught:
        rescore.word_error_rate(["a b"], ["a", "b"])
    assert caught.value.field == "hypotheses"
    assert isinstance(caught.value, ValueError)


def test_apply_in_memory_matches_apply_file(tmp_path: Path) -> None:
    model = rescore.build_model(DEMO / "train.txt")
    path = tmp_path / "m.lm"
    rescore.save_model(model, path)
    weights = rescore.Weights(lm_weight=9.0, insertion_penalty=2.0)
    out = tmp_path / "out.jsonl"
    rescore.apply_file(DEMO / "test.jsonl", out, weights, lm=path)
    in_memory = rescore.apply(rescore.read_nbest(DEMO / "test.jsonl"), weights,
                              lm=rescore.load_model(path))
    on_disk = [json.loads(line) for line in out.read_text().splitlines()]
    assert [u["best"] for u in in_memory] == [u["best"] for u in on_disk]


def test_tune_writes_nothing_unless_asked(tmp_path: Path) -> None:
    before = set(tmp_path.iterdir())
    result = rescore.tune_weights(DEMO / "dev.jsonl", lm=rescore.build_model("bay one\nbay two"),
                          folds=0)
    assert set(tmp_path.iterdir()) == before
    rescore.tune_weights(DEMO / "dev.jsonl", folds=0, weights_path=tmp_path / "w.json")
    assert rescore.read_weights(tmp_path / "w.json").insertion_penalty == pytest.approx(
        rescore.tune_weights(DEMO / "dev.jsonl", folds=0).weights.insertion_penalty)
    assert result.weights.acoustic_scale == 1.0


@pytest.mark.parametrize("name", [n for n in rescore.__all__ if n != "__version__"])
def test_every_public_name_is_documented(name: str) -> None:
    doc = getattr(rescore, name).__doc__ or ""
    assert doc.strip()
    if callable(getattr(rescore, name)) and not isinstance(getattr(rescore, name), type):
        for part in ("Parameters", "Returns", "Raises", "Examples"):
            assert part in doc, f"{name}: no {part} section"


def test_public_names_leave_the_subpackages_reachable() -> None:
    # a function named like a subpackage would replace it as an attribute of rescore
    # (``rescore.report.html`` would then fail); the API's names differ from them
    import types

    import rescore.report
    import rescore.tune
    import rescore.wer

    for module in (rescore.report, rescore.tune, rescore.wer):
        assert isinstance(module, types.ModuleType)
