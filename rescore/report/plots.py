"""Figures of the HTML report as inline SVG strings (matplotlib, Agg, no pyplot state).

Each figure gets its own fixed hash salt, so element ids are stable from run to run and do
not clash between figures on one page; the SVG carries no date.
"""

from __future__ import annotations

import io
import re
from collections.abc import Iterator, Sequence
from contextlib import contextmanager

import matplotlib
import numpy as np
import numpy.typing as npt

matplotlib.use("Agg")

from matplotlib import rc_context
from matplotlib.figure import Figure

from rescore.report.build import Report
from rescore.tune.results import Surface, TuningRecord

_BEFORE = "#8a8f98"
_AFTER = "#2f7d4f"


@contextmanager
def _style(name: str) -> Iterator[None]:
    with rc_context({
        "svg.hashsalt": f"rescore-{name}",
        "svg.fonttype": "none",
        "font.size": 10,
        "axes.spines.top": False,
        "axes.spines.right": False,
    }):
        yield


def _svg(fig: Figure, name: str) -> str:
    buf = io.StringIO()
    fig.savefig(buf, format="svg", metadata={"Date": None, "Creator": None}, bbox_inches="tight")
    text = buf.getvalue()
    text = text[text.index("<svg"):]  # drop the XML declaration and DOCTYPE
    text = re.sub(r"<metadata>.*?</metadata>", "", text, flags=re.S)
    return text.replace("<svg ", f'<svg role="img" aria-label="{name}" ', 1)


def wer_intervals(report: Report, rate: str = "WER") -> str:
    """Corpus WER (``rate``: its name, CER under --unit char) of each system with its
    bootstrap interval."""
    b = report.bootstrap
    with _style("wer"):
        fig = Figure(figsize=(5.2, 2.2))
        ax = fig.add_subplot()
        points = [(b.before_wer, b.before_ci, _BEFORE), (b.after_wer, b.after_ci, _AFTER)]
        for y, (w, (lo, hi), colour) in enumerate(points):
            ax.errorbar([100 * w], [y], xerr=[[100 * (w - lo)], [100 * (hi - w)]], fmt="o",
                        color=colour, capsize=5, markersize=7, linewidth=2)
            ax.annotate(f"{100 * w:.2f}%", (100 * w, y), textcoords="offset points",
                        xytext=(0, 9), ha="center", color=colour)
        ax.set_yticks([0, 1], ["before", "after"])
        ax.set_ylim(-0.6, 1.6)
        ax.invert_yaxis()
        ax.set_xlabel(f"{rate} (%), {100 * b.confidence:g}% bootstrap interval")
        ax.grid(axis="x", alpha=0.3)
        return _svg(fig, f"{rate} of each system with its interval")


def surface_heatmap(surface: Surface, tuning: TuningRecord) -> str:
    """Dev errors over the grid, the chosen weights starred.

    Far-off corners (an LM weight of 0, say) can hold several times the errors of the best
    region and would flatten it to one colour, so the scale stops at the 90th percentile;
    the colour bar says so.
    """
    with _style("surface"):
        fig = Figure(figsize=(5.6, 3.8))
        ax = fig.add_subplot()
        low, high, capped = colour_limits(surface.errors)
        image = ax.imshow(surface.errors, origin="lower", aspect="auto", cmap="viridis_r",
                          vmin=low, vmax=high)
        n_lm, n_pen = len(surface.lm), len(surface.penalty)
        ax.set_yticks(*_ticks(surface.lm.tolist()))
        ax.set_xticks(*_ticks(surface.penalty.tolist()))
        ax.set_ylabel("LM weight")
        ax.set_xlabel("insertion penalty")
        i, j = chosen_cell(surface, tuning)
        ax.plot([j], [i], marker="*", color="white", markersize=12, markeredgecolor="black")
        if tuning.lm_weight is not None and tuning.insertion_penalty is not None:
            ax.set_title(f"chosen (star): LM weight {tuning.lm_weight:g}, "
                         f"penalty {tuning.insertion_penalty:g}", fontsize=9)
        ax.set_xlim(-0.5, n_pen - 0.5)
        ax.set_ylim(-0.5, n_lm - 0.5)
        fig.colorbar(image, ax=ax, extend="max" if capped else "neither",
                     label="dev word errors" + (" (scale stops at 90th pct)" if capped else ""))
        return _svg(fig, "tuning error surface")


def colour_limits(errors: npt.ArrayLike) -> tuple[float, float, bool]:
    """Colour scale of the surface: its minimum to its 90th percentile (capped) or maximum."""
    values = np.asarray(errors, dtype=np.float64)
    low, high = float(values.min()), float(values.max())
    cap = float(np.percentile(values, 90))
    if low < cap < high:
        return low, cap, True
    return low, high, False


def chosen_cell(surface: Surface, tuning: TuningRecord) -> tuple[int, int]:
    """(LM row, penalty column) of the chosen weights, or of the first grid minimum when the
    tuning result does not name them; weights between grid points take the nearest cell."""
    if tuning.lm_weight is not None and tuning.insertion_penalty is not None:
        return (_nearest(surface.lm.tolist(), tuning.lm_weight),
                _nearest(surface.penalty.tolist(), tuning.insertion_penalty))
    _, i, j = min((v, i, j) for i, row in enumerate(surface.errors.tolist())
                  for j, v in enumerate(row))
    return i, j


def _nearest(values: Sequence[float], x: float) -> int:
    return min(range(len(values)), key=lambda k: (abs(values[k] - x), k))


def _ticks(values: Sequence[float], most: int = 8) -> tuple[list[int], list[str]]:
    step = max(1, -(-len(values) // most))
    idx = list(range(0, len(values), step))
    return idx, [f"{values[i]:g}" for i in idx]


def depth_curve(tuning: TuningRecord, rate: str = "WER") -> str:
    with _style("depth"):
        fig = Figure(figsize=(5.6, 3.0))
        ax = fig.add_subplot()
        ks = [r.depth for r in tuning.depth]
        for key, label, style in (("one_best_wer", "recognizer 1-best", "--"),
                                  ("tuned_wer", "rescored", "-"),
                                  ("oracle_wer", "oracle", ":")):
            pts = [(k, getattr(r, key)) for k, r in zip(ks, tuning.depth, strict=True)
                   if getattr(r, key) is not None]
            if pts:
                ax.plot([k for k, _ in pts], [100 * v for _, v in pts], style, marker="o",
                        label=label)
        ax.set_xlabel("N-best depth k")
        ax.set_ylabel(f"{rate} (%)")
        ax.grid(alpha=0.3)
        ax.legend(frameon=False, loc="best", fontsize=9)
        return _svg(fig, f"{rate} by N-best depth")
