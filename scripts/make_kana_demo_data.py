#!/usr/bin/env python3
"""Build the second demo scenario: the Midoridani mushroom cellar's spoken log, in Japanese.

Japanese is written without spaces between words, so this scenario is scored in characters
(``--unit char``: character LMs and CER). Everything is generated here from a small seeded
grammar; no outside text is used.

* ``train.txt`` and ``dev.txt``: log sentences (LM training and held-out text).
* ``dev.jsonl`` and ``test.jsonl``: N-best lists from a simulated recognizer.

The recognizer works character by character: a character may be heard as one that sounds
alike (a fixed confusion table: voiced and unvoiced kana, numerals that share a sound), a
particle may be dropped, and a filler (``え``, ``あの``) may be inserted. Each change carries
an acoustic penalty drawn from a normal distribution that overlaps zero, so the acoustics
alone often prefer a wrong character. Up to ``MAX_HYPOTHESES`` distinct variants are kept,
ordered by acoustic score; the true transcript is sometimes left out.

Run ``python scripts/make_kana_demo_data.py --out rescore/demo_data/kana`` (seeded).
"""

from __future__ import annotations

import argparse
import json
import random
import sys
from pathlib import Path

ROOT = Path(__file__).resolve().parent.parent
if str(ROOT) not in sys.path:
    sys.path.insert(0, str(ROOT))

from rescore.outputs import write_text_atomic  # noqa: E402

DEFAULT_SEED = 20261203
MAX_HYPOTHESES = 12
TRAIN, DEV_TEXT, NBEST = 4000, 200, 200

_DIGITS = "一二三四五六七八九"
_MUSHROOMS = ("しいたけ", "まいたけ", "えのき", "なめこ", "しめじ", "きくらげ")
_PLACES = ("棚", "号室", "番の箱")
_TEMPLATES = (
    "{n}{place}の温度は{t}度です",
    "{n}{place}の湿度を{h}に上げました",
    "{n}{place}の{m}を収穫しました",
    "{n}{place}に水をまきました",
    "換気扇を{k}時に止めました",
    "{m}の菌床を{n}{place}に移しました",
    "{n}{place}の{m}に白いかびが出ています",
    "{k}時に{n}{place}の灯りを消しました",
)
# sound-alike characters (both ways): voiced and unvoiced kana, numerals that share a sound
_CONFUSIONS = {
    "し": "ち", "た": "だ", "き": "ぎ", "か": "が", "な": "ま", "に": "み", "て": "で",
    "ま": "な", "ち": "し", "ぎ": "き", "が": "か", "み": "に", "で": "て", "だ": "た",
    "一": "七", "七": "一", "四": "七", "二": "三", "三": "二", "九": "五", "五": "九",
    "度": "ど", "時": "じ", "を": "お", "す": "ず", "け": "げ", "こ": "ご", "め": "ね",
}
_PARTICLES = set("のをにはが")
_FILLERS = ("え", "あの", "ん")


def number(rng: random.Random, low: int, high: int) -> str:
    """Kanji numerals for ``low <= n <= high`` (below a hundred)."""
    n = rng.randint(low, high)
    tens, ones = divmod(n, 10)
    head = "" if tens == 0 else ("十" if tens == 1 else _DIGITS[tens - 1] + "十")
    return head + ("" if ones == 0 else _DIGITS[ones - 1])


def sentence(rng: random.Random) -> str:
    return rng.choice(_TEMPLATES).format(
        n=number(rng, 1, 12), place=rng.choice(_PLACES), m=rng.choice(_MUSHROOMS),
        t=number(rng, 10, 24), h=number(rng, 80, 95), k=number(rng, 1, 12))


def variant(rng: random.Random, ref: str) -> tuple[str, float]:
    """One mis-hearing of ``ref`` and its acoustic score (natural log, higher is better)."""
    out: list[str] = []
    score = -2.0 * len(ref) + rng.gauss(0.0, 0.5)
    for ch in ref:
        if rng.random() < 0.06:
            out.append(rng.choice(_FILLERS))
            score += rng.gauss(-0.8, 1.2)
        if ch in _PARTICLES and rng.random() < 0.08:
            score += rng.gauss(-0.6, 1.2)
            continue
        if ch in _CONFUSIONS and rng.random() < 0.15:
            out.append(_CONFUSIONS[ch])
            score += rng.gauss(-0.5, 1.0)  # overlaps zero: often preferred to the truth
            continue
        out.append(ch)
    return "".join(out), score


def nbest(rng: random.Random, uid: str, ref: str, speaker: str) -> dict[str, object]:
    seen: dict[str, float] = {ref: -2.0 * len(ref) + rng.gauss(0.0, 0.5)}
    for _ in range(60):
        text, score = variant(rng, ref)
        if text not in seen or score > seen[text]:
            seen[text] = score
    ranked = sorted(seen.items(), key=lambda kv: (-kv[1], kv[0]))
    kept = ranked[:MAX_HYPOTHESES]
    return {"id": uid, "reference": ref,
            "hypotheses": [{"text": t, "acoustic": round(a, 2)} for t, a in kept],
            "meta": {"speaker": speaker}}


README = """\
# Midoridani mushroom cellar demo data

Invented data for `rescore demo --scenario kana`: the staff of a fictional mushroom cellar
dictate their log in Japanese, written without spaces, so it is scored in characters
(`--unit char`: character n-gram LMs and CER). Every sentence comes from the grammar in
`scripts/make_kana_demo_data.py`; no outside text.

- `train.txt`: {train} log sentences for LM training (repeats allowed).
- `dev.txt`: {dev_text} held-out sentences, none in `train.txt`.
- `dev.jsonl`, `test.jsonl`: {nbest} N-best lists each (up to {top} hypotheses, `meta` =
  speaker). A simulated recognizer mis-hears characters that sound alike (voiced and
  unvoiced kana, numerals that share a sound), drops particles and inserts fillers, each
  with an acoustic penalty (nats) drawn from a normal distribution that overlaps zero;
  hypotheses are ordered by acoustic score and the true transcript is sometimes missing.

Regenerate (seed {seed}, deterministic):

    python scripts/make_kana_demo_data.py --out rescore/demo_data/kana --seed {seed}
"""


def build(out: Path, seed: int = DEFAULT_SEED) -> None:
    rng = random.Random(seed)
    train = [sentence(rng) for _ in range(TRAIN)]
    known = set(train)
    held: list[str] = []
    while len(held) < DEV_TEXT + 2 * NBEST:
        s = sentence(rng)
        if s not in known and s not in held:
            held.append(s)
    dev_text, dev_refs, test_refs = (held[:DEV_TEXT], held[DEV_TEXT:DEV_TEXT + NBEST],
                                     held[DEV_TEXT + NBEST:])
    files = {
        "train.txt": "\n".join(train) + "\n",
        "dev.txt": "\n".join(dev_text) + "\n",
        "README.md": README.format(train=TRAIN, dev_text=DEV_TEXT, nbest=NBEST,
                                   top=MAX_HYPOTHESES, seed=seed),
    }
    for name, refs in (("dev.jsonl", dev_refs), ("test.jsonl", test_refs)):
        files[name] = "".join(
            json.dumps(nbest(rng, f"mido-{name[:-6]}-{i + 1:04d}", ref, f"s{i % 4 + 1:02d}"),
                       ensure_ascii=False) + "\n"
            for i, ref in enumerate(refs))
    out.mkdir(parents=True, exist_ok=True)
    for name, text in files.items():
        write_text_atomic(out / name, text)


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--out", type=Path, default=ROOT / "rescore" / "demo_data" / "kana")
    parser.add_argument("--seed", type=int, default=DEFAULT_SEED)
    args = parser.parse_args()
    build(args.out, args.seed)


if __name__ == "__main__":
    main()
