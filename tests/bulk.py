"""Fast generation of large N-best files for the scale and interruption tests.

Invented records only exercising the plumbing: a few hundred distinct lines, reused with
fresh ids, so a file of 100,000 utterances takes about a second to write.
"""

from __future__ import annotations

import json
from pathlib import Path

import numpy as np

WORDS = ["bay", "day", "row", "grow", "vent", "went", "pump", "lamp", "four", "for",
         "three", "tree", "basil", "kale", "opened", "closed", "to", "the", "percent"]


def write_bulk(path: Path, n: int, *, depth: int = 5, seed: int = 0) -> None:
    rng = np.random.default_rng(seed)
    bodies = []
    for _ in range(256):
        hyps = [{"text": " ".join(rng.choice(WORDS, size=int(rng.integers(8, 16)))),
                 "acoustic": round(float(rng.normal(-300, 20)), 3),
                 "features": {"first_pass_lm": round(float(rng.normal(-40, 5)), 3)}}
                for _ in range(depth)]
        body = json.dumps({"reference": "vent bay three opened", "hypotheses": hyps})
        bodies.append(body[1:])
    with open(path, "w") as fh:
        for i in range(n):
            fh.write(f'{{"id": "bulk-{i:07d}", {bodies[i % 256]}\n')


def write_weights(path: Path) -> None:
    path.write_text(json.dumps({"acoustic_scale": 1.0, "lm_weight": 0.0,
                                "insertion_penalty": 0.5, "features": {"first_pass_lm": 3.0}}))


def write_long_run(folder: Path) -> tuple[Path, Path]:
    """An N-best file long enough that ``apply`` is still running when a test signals or
    kills it (150,000 lists of 10), and weights for it."""
    write_bulk(folder / "big.jsonl", 150_000, depth=10)
    write_weights(folder / "w.json")
    return folder / "big.jsonl", folder / "w.json"
