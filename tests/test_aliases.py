"""Renamed options keep working for a release, with one deprecation line; global options
after the command; the perplexity JSON's natural-log total and bits per token."""

from __future__ import annotations

import json
import math
from pathlib import Path

import pytest

from rescore.cli import aliases
from tests.conftest import FIXTURES, run

DEMO = FIXTURES / "demo"


@pytest.mark.parametrize(("old", "new", "value"), [
    ("--cutoffs", "--min-ngram-counts", "1,1"),
    ("--prune", "--prune-entropy", "1e-4"),
    ("--output", "--out", None),
])
def test_old_lm_build_names_build_the_same_model_and_say_so(
        tmp_path: Path, old: str, new: str, value: str | None) -> None:
    def build(flag: str, name: str) -> Path:
        out = tmp_path / name
        extra = [flag, value] if value is not None else []
        target = [flag, out] if value is None else ["-o", out]
        res = run(["lm", "build", DEMO / "train.txt", *extra, *target])
        assert res.exit_code == 0, res.output
        notice = f"warning: {old} is deprecated; use {new}"
        assert (notice in res.stderr) == (flag == old)
        return out
    assert build(old, "old.lm").read_bytes() == build(new, "new.lm").read_bytes()


def test_rewrite_table_moves_globals_and_renames_per_command() -> None:
    argv, notices = aliases.rewrite(["lm", "build", "t.txt", "--vocab=v.txt", "-q", "-o", "m"])
    assert argv == ["-q", "lm", "build", "t.txt", "--vocabulary=v.txt", "-o", "m"]
    assert notices == ["--vocab is deprecated; use --vocabulary"]
    # a name is renamed only for the command that renamed it: apply's --weights stays
    argv, notices = aliases.rewrite(["apply", "x", "--weights", "w.json"])
    assert argv == ["apply", "x", "--weights", "w.json"] and notices == []
    argv, notices = aliases.rewrite(["lm", "mix", "a", "b", "--weights", "0.5,0.5"])
    assert argv[-2:] == ["--fixed-weights", "0.5,0.5"] and notices
    # after '--' every word is an argument, left alone
    assert aliases.rewrite(["lm", "build", "--", "--prune"])[0] == ["lm", "build", "--",
                                                                    "--prune"]


def test_quiet_after_the_command_is_the_global_option(tmp_path: Path) -> None:
    out = tmp_path / "m.lm"
    res = run(["lm", "build", DEMO / "train.txt", "-o", out, "--quiet"])
    assert res.exit_code == 0, res.output
    assert "wrote" not in res.stderr and out.exists()


def test_perplexity_json_gives_natural_log_total_and_bits_per_token(tmp_path: Path) -> None:
    model = tmp_path / "m.lm"
    assert run(["lm", "build", DEMO / "train.txt", "-o", model]).exit_code == 0
    res = run(["lm", "perplexity", model, DEMO / "dev.txt", "--json"])
    data = json.loads(res.stdout)
    # ln x = log10 x * ln 10; bits per token = log2 of the perplexity (definition of
    # perplexity as 2 to the cross entropy in bits)
    assert data["ln_prob"] == pytest.approx(data["log10_prob"] * math.log(10), rel=1e-12)
    assert data["bits_per_token"] == pytest.approx(math.log2(data["perplexity"]), rel=1e-9)
    assert data["bits_per_token"] == pytest.approx(
        -data["log10_prob"] / data["tokens"] / math.log10(2), rel=1e-12)
