"""Grid widening, the exact search's box (--bounds) and --no-widen, through the command."""

from __future__ import annotations

import json
from pathlib import Path

import numpy as np
import pytest

from rescore.tune import MAX_WIDENINGS, tune
from tests.conftest import run
from tests.test_tune import signal_set

WORDS = ["bay", "row", "pump", "vent", "lamp", "tray", "two", "three", "four", "five"]


def write_far_optimum(path: Path, n_utt: int = 300, seed: int = 5, deletion: tuple[float,
                      float] = (20.0, 70.0), insertion: tuple[float, float] = (40.0, 120.0)
                      ) -> None:
    """Lists whose best insertion penalty lies far above the default grid's top (+20).

    Each list holds the reference (acoustic a), the reference less its last word
    (a + d) and the reference plus a word (a - e). Worked out: with penalty p per word
    the reference wins over the deletion when p > d and over the insertion when p < e, so
    each utterance is right for p in (d, e), and wrong (one error) elsewhere. With d drawn
    from ``deletion`` and e from ``insertion``, the fewest errors lie near p = 50 to 60,
    outside -20..20.
    """
    rng = np.random.default_rng(seed)
    lines = []
    for u in range(n_utt):
        ref = list(rng.choice(WORDS, size=int(rng.integers(4, 9))))
        a = float(rng.uniform(-400, -200))
        d, e = rng.uniform(*deletion), rng.uniform(*insertion)
        hyps = [(ref[:-1], a + d), (ref, a), ([*ref, "uh"], a - e)]  # best acoustic first
        lines.append(json.dumps({"id": f"far-{u:04d}", "reference": " ".join(ref),
                                 "hypotheses": [{"text": " ".join(t), "acoustic": round(s, 3)}
                                                for t, s in hyps]}))
    path.write_text("\n".join(lines) + "\n")


def _tune(path: Path, out: Path, *extra: str) -> dict[str, object]:
    result = run(["tune", path, "-o", out, "--folds", "0", "--json", *extra])
    assert result.exit_code == 0, result.stderr
    data: dict[str, object] = json.loads(result.stdout)
    data["stderr"] = result.stderr
    return data


def test_widened_grid_reaches_the_exact_search_within_one_percent(tmp_path: Path) -> None:
    # issue check: on a set whose optimum lies outside the default grid, the widened grid
    # reaches the exact search's error count within 1 %
    dev = tmp_path / "far.jsonl"
    write_far_optimum(dev)
    exact = _tune(dev, tmp_path / "e.json", "--search", "exact")
    widened = _tune(dev, tmp_path / "g.json")
    fixed = _tune(dev, tmp_path / "f.json", "--no-widen")
    exact_errors, grid_errors = int(exact["dev_errors"]), int(widened["dev_errors"])  # type: ignore[call-overload]
    assert grid_errors <= exact_errors * 1.01
    # derived (docstring of write_far_optimum): the best penalty is far above +20
    assert float(widened["insertion_penalty"]) > 20  # type: ignore[arg-type]
    assert widened["widenings"] and widened["edge_warning"] is None
    assert "grid widened to" in str(widened["stderr"])
    # the fixed grid stops at +20 and is much worse: every utterance with d > 20 is wrong
    assert int(fixed["dev_errors"]) > grid_errors * 1.5  # type: ignore[call-overload]
    assert fixed["widenings"] == [] and "--no-widen" in str(fixed["edge_warning"])


def test_widening_stops_at_the_documented_maximum(tmp_path: Path) -> None:
    # an optimum near p = 450 with a box of -1000..1000. Below p = 400 every utterance is
    # wrong (write_far_optimum: right only for p in (d, e), d >= 400), so the whole grid
    # shares the fewest errors and each widening adds half the span at both ends:
    # -20..20 -> -40..40 -> -80..80 -> -160..160 -> -320..320, still below 400 after the
    # 4 widenings allowed (README, tuning section), so a warning says so
    dev = tmp_path / "far.jsonl"
    write_far_optimum(dev, n_utt=60, deletion=(400.0, 450.0), insertion=(500.0, 600.0))
    data = _tune(dev, tmp_path / "w.json", "--bounds", "0:100,-1000:1000")
    steps = data["widenings"]
    assert isinstance(steps, list) and len(steps) == MAX_WIDENINGS == 4
    assert [s["penalty_grid"][1] for s in steps] == pytest.approx([40, 80, 160, 320])
    assert [s["sides"] for s in steps] == [["penalty_low", "penalty_high"]] * 4
    assert "after 4 widenings" in str(data["edge_warning"])


def test_widening_stays_inside_the_bounds(tmp_path: Path) -> None:
    dev = tmp_path / "far.jsonl"
    write_far_optimum(dev, n_utt=100)
    data = _tune(dev, tmp_path / "w.json", "--bounds", "0:100,-100:30")
    steps = data["widenings"]
    assert isinstance(steps, list)
    # -20..20 in steps of 0.5; below p = 20 every utterance is wrong (d >= 20), so the
    # whole grid shares the fewest errors: widened by half the span (20) at the bottom,
    # by 10 to the box's 30 at the top, and no further
    assert steps[-1]["penalty_grid"] == pytest.approx([-40.0, 30.0, 141])
    assert "search box" in str(data["edge_warning"])
    prov = json.loads((tmp_path / "w.json").read_text())["provenance"]
    assert prov["settings"]["bounds"] == {"words": [-100.0, 30.0]}  # no LM: penalty only


def test_bounds_limit_the_exact_search(tmp_path: Path) -> None:
    dev = tmp_path / "far.jsonl"
    write_far_optimum(dev, n_utt=100)
    data = _tune(dev, tmp_path / "w.json", "--search", "exact", "--bounds", "0:10,-5:5")
    assert -5.0 <= float(data["insertion_penalty"]) <= 5.0  # type: ignore[arg-type]
    wide = _tune(dev, tmp_path / "w2.json", "--search", "exact")
    # derived (write_far_optimum): the best penalty lies near 50 to 60, inside the
    # default box (-100..100) and outside -5..5
    assert float(wide["insertion_penalty"]) > 20  # type: ignore[arg-type]


@pytest.mark.parametrize("text", ["0:10", "0:10,5", "10:0,-5:5", "a:b,0:1", "0:1,nan:2",
                                  "0:1,-1:1,2:3"])
def test_bounds_usage_errors(tmp_path: Path, text: str) -> None:
    dev = tmp_path / "far.jsonl"
    write_far_optimum(dev, n_utt=5)
    result = run(["tune", dev, "-o", tmp_path / "w.json", "--bounds", text])
    assert result.exit_code == 2
    assert "LM_LOW:LM_HIGH,PEN_LOW:PEN_HIGH" in result.stderr
    assert not (tmp_path / "w.json").exists()


def test_lm_axis_is_widened_too() -> None:
    # the LM column divided by 20 moves the best LM weight 20 times higher, beyond the
    # default grid's top of 30 (signal_set's lists are best near an LM weight of a few units)
    m = signal_set(n_utt=120)
    scaled = m.values.copy()
    scaled[:, 1] /= 20.0
    far = type(m)(names=m.names, values=scaled, offsets=m.offsets, ids=m.ids,
                  errors=m.errors, ref_words=m.ref_words)
    result = tune(far, folds=0)
    assert result.widenings and "lm_high" in result.widenings[0].sides
    assert result.widenings[0].lm_grid[1] == pytest.approx(45.0)  # 30 + half of 30
    fixed = tune(far, folds=0, widen=False)
    assert fixed.widenings == () and fixed.edge_warning is not None
    # the widened grid holds the fixed one, so it can only do as well or better; here the
    # fixed grid's fewest-errors region reaches its top LM weight and the widened one
    # finds fewer errors beyond it
    assert result.dev_errors < fixed.dev_errors
    assert "highest LM weight" in (fixed.edge_warning or "")
    assert result.weights.lm_weight > 30.0


def test_a_grid_already_past_the_box_or_without_a_step_is_not_widened(tmp_path: Path
                                                                      ) -> None:
    # -200..200 already lies past the default box (-100..100): no widening can add a point
    # inside it, so the grid stays and the warning names the box; a grid of one repeated
    # value (5:5:3) has no step to widen by
    dev = tmp_path / "far.jsonl"
    write_far_optimum(dev, n_utt=30, deletion=(300.0, 320.0), insertion=(900.0, 950.0))
    data = _tune(dev, tmp_path / "w.json", "--grid-penalty", "-200:200:5")
    assert data["widenings"] == [] and "search box" in str(data["edge_warning"])
    same = _tune(dev, tmp_path / "w2.json", "--grid-penalty", "5:5:3")
    assert same["widenings"] == []
