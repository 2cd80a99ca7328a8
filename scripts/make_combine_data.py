#!/usr/bin/env python3
"""Two simulated recognizers of the demo scenario, for checking `rescore combine`.

Each system decodes the same dev and test references as the bundled demo lists (read from
``rescore/demo_data/{dev,test}.jsonl``) with the demo's own recognizer simulation
(``scripts/make_demo_data.py``: sound-alike confusions, filler insertions, function-word
deletions, noise bursts, the generic first pass and its beam), each from its own random
stream and with its own acoustic profile, so the two systems' word errors and acoustic
scores are independent of each other (real recognizers' errors are not: they share hard
words and noisy stretches, so combining them gains less than it does here).

- System ``A``: the demo's acoustics.
- System ``B``: another front end: more sound-alike rivals, fewer noise bursts, and its
  acoustic scores on another scale (``score_scale``), so tuning has to learn how far to
  trust each system's scores.

Writes ``dev.A.jsonl``, ``test.A.jsonl``, ``dev.B.jsonl`` and ``test.B.jsonl`` (contract
format, the same ids, references and meta as the demo lists). Run
``python scripts/make_combine_data.py --out DIR`` (seeded, deterministic).
"""

from __future__ import annotations

import argparse
import json
import random
import sys
from collections.abc import Sequence
from dataclasses import dataclass
from pathlib import Path

SCRIPTS = Path(__file__).resolve().parent
ROOT = SCRIPTS.parent
for _path in (ROOT, SCRIPTS):
    if str(_path) not in sys.path:
        sys.path.insert(0, str(_path))

import make_demo_data as demo  # noqa: E402

from rescore.demo import BUNDLED  # noqa: E402
from rescore.outputs import write_text_atomic  # noqa: E402

DEFAULT_SEED = 20261203
SPLITS = ("dev", "test")


@dataclass(frozen=True)
class System:
    name: str
    acoustics: demo.Acoustics
    score_scale: float = 1.0  # the unit of this system's acoustic scores (1.0: nats)


SYSTEMS = (
    System("A", demo.Acoustics()),
    System("B", demo.Acoustics(substitution_mean=1.4, alternative_rate=0.4, burst_rate=0.08,
                               spread=2.2), score_scale=0.5),
)


def vendor_unigram() -> demo.Unigram:
    """The demo's generic first pass, rebuilt exactly as make_demo_data.py builds it."""
    rng = random.Random(f"{demo.DEFAULT_SEED}/background")
    return demo.Unigram(demo.sentences(demo.EVERYDAY, rng, demo.FULL.background, set()))


def references(data: Path, split: str) -> list[dict[str, object]]:
    """The demo list's records of ``split`` without their hypotheses."""
    with open(data / f"{split}.jsonl", encoding="utf-8") as fh:
        return [{k: v for k, v in json.loads(line).items() if k != "hypotheses"}
                for line in fh if line.strip()]


def system_records(system: System, records: Sequence[dict[str, object]],
                   first_pass: demo.Unigram, rng: random.Random) -> list[str]:
    """One JSON line per record: ``system``'s N-best list of its reference."""
    recognizer = demo.Recognizer(first_pass, system.acoustics)
    lines = []
    for record in records:
        meta = record.get("meta", {})
        speaker = next((s for s in demo.SPEAKERS
                        if isinstance(meta, dict) and s.name == meta.get("speaker")),
                       demo.SPEAKERS[0])
        shift = meta.get("shift", "day") if isinstance(meta, dict) else "day"
        clarity = speaker.clarity * demo.SHIFT_NOISE.get(str(shift), 1.0)
        hyps = recognizer.nbest(str(record["reference"]).split(), rng, clarity)
        for hyp in hyps:
            hyp["acoustic"] = round(system.score_scale * float(hyp["acoustic"]), 2)  # type: ignore[arg-type]
        # the demo files' key order: id, reference, hypotheses, meta
        out = {"id": record["id"], "reference": record["reference"], "hypotheses": hyps,
               **({"meta": meta} if "meta" in record else {})}
        lines.append(json.dumps(out, ensure_ascii=False))
    return lines


def generate(out: Path, seed: int = DEFAULT_SEED, data: Path = BUNDLED,
             limit: int | None = None) -> dict[str, int]:
    """Write every system's dev and test lists into ``out`` (the first ``limit`` records
    of each split when given); returns the line count of each file."""
    out.mkdir(parents=True, exist_ok=True)
    first_pass = vendor_unigram()
    counts: dict[str, int] = {}
    for split in SPLITS:
        records = references(data, split)[:limit]
        for system in SYSTEMS:
            rng = random.Random(f"{seed}/{system.name}/{split}")
            lines = system_records(system, records, first_pass, rng)
            name = f"{split}.{system.name}.jsonl"
            write_text_atomic(out / name, "".join(line + "\n" for line in lines))
            counts[name] = len(lines)
    return counts


def main(argv: Sequence[str] | None = None) -> int:
    parser = argparse.ArgumentParser(description=__doc__.split("\n\n")[0])
    parser.add_argument("--out", type=Path, required=True, help="output folder")
    parser.add_argument("--seed", type=int, default=DEFAULT_SEED, help="random seed")
    parser.add_argument("--data", type=Path, default=BUNDLED,
                        help="folder holding the demo's dev.jsonl and test.jsonl")
    args = parser.parse_args(argv)
    for name, n in generate(args.out, args.seed, args.data).items():
        print(f"{args.out / name}: {n} lines")
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
