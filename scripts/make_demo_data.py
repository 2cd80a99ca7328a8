#!/usr/bin/env python3
"""Build the bundled demo data: the Larkspur Growhouse voice logbook.

Everything is generated here from small grammars; no outside text is used.

* ``train.txt`` and ``dev.txt``: in-domain logbook sentences (LM training and held-out text).
* ``background.txt``: general-English sentences from a second grammar: everyday talk, part of
  which shares words with the logbook (numbers, times, plants, pumps, shifts).
* ``dev.jsonl`` and ``test.jsonl``: N-best lists from a simulated recognizer.

The recognizer simulation builds, for each reference sentence, a word lattice: every word
position offers the spoken word plus some acoustically confusable alternatives (a fixed
confusion table), short function words may be dropped, and short filler words may be
inserted between words. Each alternative carries an acoustic penalty drawn from a normal
distribution whose mean is a few nats and which overlaps zero, so the acoustics alone often
prefer a wrong word. A weak generic first pass (a unigram model of everyday text that is
not shipped and knows nothing of the farm,
weighted by ``FIRST_PASS_WEIGHT``) is added, the best paths are taken in order of
``acoustic + FIRST_PASS_WEIGHT * first_pass_lm`` and pruned to a beam and at most 20
entries. Nothing but those two scores decides the order; the true transcript is pruned away
whenever its first-pass score falls out of the beam.

Run ``python scripts/make_demo_data.py --out fixtures/demo`` to regenerate (seeded).
"""

from __future__ import annotations

import argparse
import heapq
import json
import math
import random
import sys
from collections import Counter
from collections.abc import Callable, Iterable, Sequence
from dataclasses import dataclass
from pathlib import Path

ROOT = Path(__file__).resolve().parent.parent
if str(ROOT) not in sys.path:
    sys.path.insert(0, str(ROOT))

from rescore.outputs import write_text_atomic  # noqa: E402
from rescore.text import normalise  # noqa: E402

DEFAULT_SEED = 20240611
MAX_HYPOTHESES = 20
# Weight of the generic unigram score in the simulated first pass (natural-log units).
FIRST_PASS_WEIGHT = 0.2


@dataclass(frozen=True)
class Sizes:
    train: int
    dev_text: int
    background: int
    nbest: int


FULL = Sizes(train=15000, dev_text=400, background=20000, nbest=500)
SMALL = Sizes(train=1500, dev_text=60, background=1500, nbest=60)

# ---------------------------------------------------------------------------------------
# Numbers and shared slot fillers

_ONES = ("zero", "one", "two", "three", "four", "five", "six", "seven", "eight", "nine", "ten",
         "eleven", "twelve", "thirteen", "fourteen", "fifteen", "sixteen", "seventeen",
         "eighteen", "nineteen")
_TENS = ("", "", "twenty", "thirty", "forty", "fifty", "sixty", "seventy", "eighty", "ninety")


def number(n: int) -> str:
    """English words for 0 <= n <= 100."""
    if n == 100:
        return "one hundred"
    if n < 20:
        return _ONES[n]
    tens, ones = divmod(n, 10)
    return _TENS[tens] + (" " + _ONES[ones] if ones else "")


def clock_24(rng: random.Random) -> str:
    """A logbook time spoken the 24-hour way: 'oh six hundred', 'fourteen thirty'."""
    hour = rng.randrange(1, 24)
    minute = rng.choice((0, 0, 0, 15, 30, 45))
    head = ("oh " + number(hour)) if hour < 10 else number(hour)
    return head + " " + ("hundred" if minute == 0 else number(minute))


def clock_12(rng: random.Random) -> str:
    """An everyday time: 'half past six', 'seven thirty', 'ten o'clock'."""
    hour = rng.randrange(1, 13)
    return rng.choice((
        f"{number(hour)} o'clock",
        f"half past {number(hour)}",
        f"quarter to {number(hour)}",
        f"{number(hour)} thirty",
        f"{number(hour)} fifteen",
    ))


Filler = Callable[[random.Random], str]


def pick(*choices: str) -> Filler:
    return lambda rng: rng.choice(choices)


def numbered(lo: int, hi: int) -> Filler:
    return lambda rng: number(rng.randint(lo, hi))


def percent(rng: random.Random) -> str:
    return number(5 * rng.randint(2, 20)) + " percent"


def ph_value(rng: random.Random) -> str:
    whole, tenth = divmod(rng.randint(54, 68), 10)
    return f"{number(whole)} point {number(tenth)}"


def ec_value(rng: random.Random) -> str:
    whole, tenth = divmod(rng.randint(10, 26), 10)
    return f"{number(whole)} point {number(tenth)}"


class Grammar:
    """Weighted sentence templates with ``{slot}`` fillers; optional tails in ``[...]``."""

    def __init__(self, templates: Sequence[tuple[float, str]], slots: dict[str, Filler]):
        self.templates = [t for _, t in templates]
        self.weights = [w for w, _ in templates]
        self.slots = slots

    def sentence(self, rng: random.Random) -> str:
        template = rng.choices(self.templates, weights=self.weights)[0]
        out: list[str] = []
        for part in template.split():
            optional = part.startswith("[") and part.endswith("]")
            if optional:
                if rng.random() < 0.5:
                    continue
                part = part[1:-1]
            for piece in part.split("+"):
                if piece.startswith("{"):
                    out.append(self.slots[piece[1:-1]](rng))
                else:
                    out.append(piece)
        return normalise(" ".join(out))


CREW = ("priya", "tomas", "wren", "kofi", "amara", "jules", "lena", "marco", "sunita", "dmitri")
CROPS = ("basil", "butterhead lettuce", "microgreens", "strawberries", "kale", "pea shoots",
         "rocket", "mint", "chard", "coriander", "spinach", "sunflower shoots")

DOMAIN_SLOTS: dict[str, Filler] = {
    "bay": numbered(1, 8),
    "row": numbered(1, 24),
    "bank": numbered(1, 12),
    "pump": numbered(1, 6),
    "tank": numbered(1, 4),
    "count": numbered(2, 30),
    "temp": numbered(16, 29),
    "pct": percent,
    "ph": ph_value,
    "ec": ec_value,
    "time": lambda rng: "at " + clock_24(rng),
    "clock": clock_24,
    "crop": pick(*CROPS),
    "name": pick(*CREW),
    "shift": pick("night", "day", "late"),
    "state": pick("look leggy", "look healthy", "need thinning", "show tip burn",
                  "are ready to harvest", "are wilting", "look pale", "are flowering early"),
    "task": pick("seeded", "harvested", "transplanted", "thinned", "checked", "sprayed"),
    "lampverb": pick("dimmed to", "raised to", "set to"),
    "onoff": pick("on", "off"),
    "pumpverb": pick("started", "stopped", "primed", "restarted"),
    "reads": pick("is", "reads", "at"),
    "fault": pick("blocked", "dripping", "loose", "cracked"),
}

DOMAIN = Grammar(
    [
        (6, "vent bay {bay} opened to {pct} [{time}]"),
        (3, "vent bay {bay} closed [{time}]"),
        (2, "{time} vent bay {bay} opened to {pct}"),
        (5, "lamp bank {bank} {lampverb} {pct} [{time}]"),
        (3, "lamp bank {bank} switched {onoff} [{time}]"),
        (2, "lamps in bay {bay} set to {pct}"),
        (1, "lamp bank {bank} flickering in bay {bay}"),
        (4, "pump {pump} {pumpverb} [{time}]"),
        (2, "nutrient pump {pump} running at {pct} flow"),
        (5, "ph in bay {bay} row {row} {reads} {ph}"),
        (4, "bay {bay} row {row} ph {ph} e c {ec}"),
        (3, "e c in bay {bay} {reads} {ec}"),
        (1, "ph adjusted from {ph} to {ph} in tank {tank}"),
        (5, "{task} {crop} in bay {bay} row {row}"),
        (2, "harvested {count} trays of {crop} from bay {bay}"),
        (2, "moved {count} trays of {crop} to bay {bay} row {row}"),
        (4, "{crop} in bay {bay} row {row} {state}"),
        (2, "seedlings in row {row} {state}"),
        (3, "{shift} shift handed over to {name} [{time}]"),
        (2, "{name} started the {shift} shift {time}"),
        (2, "tank {tank} topped up [to+{pct}]"),
        (2, "humidity in bay {bay} at {pct}"),
        (2, "temperature in bay {bay} {temp} degrees"),
        (2, "misting nozzle in bay {bay} row {row} {fault}"),
        (2, "found mites on the {crop} in bay {bay} row {row}"),
        (1, "{name} cleaned the filter on pump {pump}"),
        (1, "flushed the lines in bay {bay} [{time}]"),
    ],
    DOMAIN_SLOTS,
)

FRIENDS = ("sam", "alex", "nora", "ben", "maya", "leo", "ruth", "omar", "ivy", "dan")

EVERYDAY_TEMPLATES: list[tuple[float, str]] = [
        (4, "it {weather} {when}"),
        (2, "it will be {temp} degrees {day}"),
        (3, "the {vehicle} to {place} leaves at {clock}"),
        (2, "my {vehicle} was {count} minutes late again"),
        (2, "the flight to {place} was delayed by {small} hours"),
        (4, "i need to {errand} {thing} {after}"),
        (3, "we had {food} for {meal} {day}"),
        (2, "can you {contact} {friend} about {topic}"),
        (3, "the meeting was moved to {day} at {clock}"),
        (2, "my {kin} is coming to stay for {small} days"),
        (3, "{who} went to the {venue} {past}"),
        (2, "the {shop} closes at {clock} {day}"),
        (2, "there were {count} people at the {event}"),
        (2, "i paid {count} pounds for {purchase}"),
        (2, "please turn the {device} off before you go to bed"),
        (1, "the tyre on my bike needs a pump"),
        (2, "we walked {small} miles along the {scenery}"),
        (2, "{friend} said the {event} starts at {clock}"),
        (2, "i left my {thing} at the {venue}"),
        (2, "the report is due {day} so i will work late"),
        (1, "they painted the kitchen a pale shade of {colour}"),
        (2, "the {device} in the hall keeps flickering"),
        (2, "{who} planted {plant} in the garden {past}"),
]

# Everyday talk that shares words with the logbook (numbers, 24-hour times, plants, pumps,
# shifts), so that a general model knows some of what the domain says.
SHARED_TEMPLATES: list[tuple[float, str]] = [
        (2, "the coach for {place} leaves from bay {small} at {clock24}"),
        (2, "we grew {gcrop} on the balcony {past}"),
        (2, "i bought {gcrop} at the market for {small} pounds"),
        (1, "the {gcrop} in the window box {gstate}"),
        (2, "the pump in the {room} stopped working {past}"),
        (2, "turn the heating up to {temp} degrees"),
        (1, "the humidity was {pct} {day}"),
        (1, "the battery on my phone is at {pct}"),
        (2, "open the window in the {room} a little"),
        (2, "we sat in row {count} at the {venue}"),
        (2, "{friend} works the {shift} shift at the {workplace}"),
        (2, "my shift at the {workplace} starts at {clock24}"),
        (1, "the filter in the fish tank needs cleaning"),
        (1, "the water in the tank was {temp} degrees"),
        (1, "the seedlings on the windowsill {gstate}"),
        (2, "the train was {count} minutes late at {clock24}"),
        (1, "set the timer for {count} minutes"),
        (1, "switch the {device} on when you get in"),
]

BACKGROUND_SLOTS: dict[str, Filler] = {
        "weather": pick("rained", "snowed", "was sunny", "was cold", "was windy", "poured",
                        "was foggy", "cleared up"),
        "when": pick("all morning", "in the afternoon", "on the way to work", "at the weekend",
                     "all night", "for most of the day", "just after lunch"),
        "temp": numbered(0, 35),
        "day": pick("tomorrow", "today", "on monday", "on tuesday", "on wednesday",
                    "on thursday", "on friday", "on saturday", "on sunday", "next week"),
        "vehicle": pick("bus", "train", "ferry", "coach", "tram"),
        "place": pick("the city", "town", "the coast", "the airport", "the station", "london",
                      "the north", "the island"),
        "clock": clock_12,
        "count": numbered(2, 60),
        "small": numbered(2, 12),
        "errand": pick("buy", "pick up", "drop off", "return", "collect", "post"),
        "thing": pick("some bread", "the parcel", "milk", "eggs", "a new lamp", "the keys",
                      "my umbrella", "the library books", "a birthday card", "the shoes"),
        "after": pick("on the way home", "before lunch", "after work", "at the shop",
                      "this evening", "first thing tomorrow"),
        "food": pick("soup", "pasta", "rice", "a sandwich", "fish and chips", "curry",
                     "a salad", "pancakes", "toast", "noodles"),
        "meal": pick("lunch", "dinner", "breakfast", "tea"),
        "contact": pick("call", "text", "email", "ask", "remind"),
        "friend": pick(*FRIENDS),
        "topic": pick("the rent", "dinner", "the tickets", "the car", "the holiday",
                      "the party", "the dog"),
        "kin": pick("sister", "brother", "friend", "neighbour", "cousin", "aunt", "uncle"),
        "who": pick("i", "we", "they", "my parents", "the kids", *FRIENDS),
        "venue": pick("market", "park", "beach", "cinema", "gym", "office", "pub", "museum"),
        "past": pick("yesterday", "last week", "on saturday", "this morning", "last night",
                     "two days ago"),
        "shop": pick("bakery", "library", "bank", "post office", "chemist", "supermarket"),
        "event": pick("party", "station", "market", "game", "concert", "wedding", "match"),
        "purchase": pick("the tickets", "a taxi", "dinner", "the repair", "new boots",
                         "the hotel"),
        "device": pick("lamp", "heater", "radio", "light", "fan", "television"),
        "scenery": pick("river", "beach", "canal", "cliffs", "old railway"),
        "colour": pick("green", "blue", "yellow", "grey"),
        "plant": pick("tomatoes", "beans", "sunflowers", "potatoes", "herbs", "roses"),
        "clock24": clock_24,
        "pct": percent,
        "gcrop": pick("basil", "mint", "lettuce", "strawberries", "kale", "spinach", "rocket",
                      "chard", "coriander", "tomatoes", "herbs"),
        "gstate": pick("look healthy", "are wilting", "look leggy", "need water",
                       "are flowering"),
        "room": pick("kitchen", "cellar", "garage", "bathroom", "hall", "shed"),
        "shift": pick("night", "day", "early", "late"),
        "workplace": pick("hospital", "warehouse", "bakery", "station", "factory", "depot"),
}

# The general-English text we ship (background.txt) is everyday talk plus the shared part.
BACKGROUND = Grammar(EVERYDAY_TEMPLATES + SHARED_TEMPLATES, BACKGROUND_SLOTS)
# The recognizer vendor's own generic text behind the simulated first pass, not shipped:
# everyday talk only, so the first pass knows nothing of the farm.
EVERYDAY = Grammar(EVERYDAY_TEMPLATES, BACKGROUND_SLOTS)

# ---------------------------------------------------------------------------------------
# The confusion model

# Groups of words that sound alike; any member may be heard as any other.
CONFUSABLE_GROUPS: tuple[tuple[str, ...], ...] = (
    ("bay", "day", "they", "may"),
    ("vent", "went", "bent", "meant"),
    ("eight", "ate", "weight"),
    ("row", "grow", "roe"),
    ("four", "for"),
    ("two", "to", "too"),
    ("lamp", "lamb", "lump"),
    ("lamps", "lambs", "lumps"),
    ("pump", "bump"),
    ("kale", "gale", "cale"),
    ("basil", "dazzle", "basal"),
    ("point", "pint", "joint"),
    ("three", "tree", "free"),
    ("one", "won"),
    ("nine", "line", "mine"),
    ("ten", "then", "tent"),
    ("six", "sticks"),
    ("sixteen", "sixty"),
    ("thirteen", "thirty"),
    ("fourteen", "forty"),
    ("fifteen", "fifty"),
    ("seventeen", "seventy"),
    ("eighteen", "eighty"),
    ("nineteen", "ninety"),
    ("bank", "tank", "bang"),
    ("opened", "open", "opens"),
    ("closed", "close", "clothes"),
    ("dimmed", "dim", "dimmer"),
    ("started", "starting"),
    ("stopped", "stop"),
    ("seedlings", "seedling"),
    ("strawberries", "strawberry"),
    ("shoots", "shoot", "suits"),
    ("night", "knight", "nice"),
    ("shift", "sift", "shaft"),
    ("hundred", "hunter"),
    ("oh", "o", "owe"),
    ("trays", "trees", "trace"),
    ("mites", "mights", "nights"),
    ("flow", "slow", "floor"),
    ("leggy", "lucky", "legging"),
    ("misting", "missing"),
    ("degrees", "decrees"),
    ("humidity", "humility"),
    ("mint", "meant", "mind"),
    ("chard", "charred", "shard"),
    ("in", "and", "an"),
    ("at", "that", "it"),
    ("on", "in"),
    ("off", "of"),
    ("the", "a"),
    ("is", "as"),
    ("pea", "pee", "p"),
    ("wren", "ren", "when"),
    ("jules", "jewels"),
    ("lena", "leaner"),
    ("tomas", "thomas"),
    ("kofi", "coffee"),
)

# One-way confusions, several words heard for one or one for several.
SPLITS: tuple[tuple[str, str], ...] = (
    ("lettuce", "let us"),
    ("butterhead", "butter head"),
    ("butterhead", "better head"),
    ("microgreens", "micro greens"),
    ("microgreens", "micro grains"),
    ("strawberries", "straw berries"),
    ("percent", "per cent"),
    ("percent", "present"),
    ("ph", "p h"),
    ("ph", "pee aitch"),
    ("ph", "fee"),
    ("e c", "easy"),
    ("e c", "e see"),
    ("e c", "he c"),
    ("priya", "pria"),
    ("priya", "free a"),
    ("amara", "a mara"),
    ("marco", "mark oh"),
    ("sunita", "sue neater"),
    ("dmitri", "the metri"),
    ("harvested", "harvest it"),
    ("coriander", "cory ander"),
    ("topped up", "top tup"),
    ("sunflower", "sun flower"),
)

DELETABLE = ("the", "a", "to", "at", "in", "of", "on", "and", "is")
FILLERS = ("the", "a", "uh", "um", "and", "of")


def confusion_table() -> dict[tuple[str, ...], list[tuple[str, ...]]]:
    """Each confusable word (or word pair) mapped to what it may be heard as."""
    table: dict[tuple[str, ...], list[tuple[str, ...]]] = {}
    for group in CONFUSABLE_GROUPS:
        for word in group:
            alts = table.setdefault((word,), [])
            for other in group:
                if other != word and (other,) not in alts:
                    alts.append((other,))
    for spoken, heard in SPLITS:
        table.setdefault(tuple(spoken.split()), []).append(tuple(heard.split()))
    return table


@dataclass(frozen=True)
class Acoustics:
    """Parameters of the simulated acoustic evidence, in nats."""

    substitution_mean: float = 1.2
    insertion_mean: float = 3.0
    deletion_mean: float = 2.5
    spread: float = 2.5  # standard deviation of every penalty; overlaps zero
    alternative_rate: float = 0.33  # chance that a listed confusion reaches the lattice
    max_alternatives: int = 1  # rivals of one spoken word at most
    insertion_rate: float = 0.08  # chance of a filler option between two words
    deletion_rate: float = 0.2  # chance that a function word may be skipped
    burst_rate: float = 0.12  # chance of a noise burst over a stretch of words
    burst_penalty: tuple[float, float] = (8.0, 16.0)  # per buried word
    burst_length: tuple[int, ...] = (3, 4, 5, 6)  # words a burst covers
    beam: tuple[float, float] = (6.0, 16.0)  # first-pass pruning beam, drawn per utterance


Option = tuple[tuple[str, ...], float]  # (words heard, acoustic penalty in nats)


@dataclass(frozen=True)
class Speaker:
    name: str
    clarity: float  # scales every penalty mean; below 1 means harder to hear


SPEAKERS = tuple(
    Speaker(f"s{i + 1:02d}", c)
    for i, c in enumerate((1.25, 1.1, 1.0, 0.95, 0.9, 0.85, 1.05, 0.8, 1.15, 0.7))
)
SHIFT_NOISE = {"day": 1.0, "late": 0.95, "night": 0.85}  # night: the dehumidifiers run


class Recognizer:
    """A simulated first pass turning a reference sentence into an N-best list."""

    def __init__(self, first_pass: Unigram, acoustics: Acoustics | None = None):
        self.first_pass = first_pass
        self.ac = acoustics or Acoustics()
        self.table = confusion_table()

    def lattice(self, ref: Sequence[str], rng: random.Random, clarity: float) -> list[list[Option]]:
        ac = self.ac
        slots: list[list[Option]] = []

        def penalty(mean: float) -> float:
            return rng.gauss(mean * clarity, ac.spread)

        def gap() -> None:
            if rng.random() < ac.insertion_rate:
                slots.append([((), 0.0), ((rng.choice(FILLERS),), penalty(ac.insertion_mean))])

        i = 0
        while i < len(ref):
            gap()
            span = 2 if tuple(ref[i:i + 2]) in self.table else 1
            spoken = tuple(ref[i:i + span])
            options: list[Option] = [(spoken, 0.0)]
            for heard in self.table.get(spoken, []):
                if len(options) <= ac.max_alternatives and rng.random() < ac.alternative_rate:
                    options.append((heard, penalty(ac.substitution_mean)))
            if span == 1 and spoken[0] in DELETABLE and rng.random() < ac.deletion_rate:
                options.append(((), penalty(ac.deletion_mean)))
            slots.append(options)
            i += span
        gap()
        if rng.random() < ac.burst_rate:
            self._burst(slots, rng, clarity)
        return slots

    def _burst(self, slots: list[list[Option]], rng: random.Random, clarity: float) -> None:
        """A noise burst over a stretch of words: each spoken word there now scores worse
        than a rival (a sound-alike, or nothing at all when the burst swallowed it)."""
        words = [i for i, slot in enumerate(slots) if slot[0][0]]
        length = rng.choice(self.ac.burst_length)
        start = rng.randrange(max(1, len(words) - length + 1))
        for i in words[start:start + length]:
            slot = slots[i]
            if len(slot) == 1:
                rivals = self.table.get(slot[0][0], [()])
                slot.append((rng.choice(rivals),
                             rng.gauss(self.ac.substitution_mean * clarity, self.ac.spread)))
            slot[0] = (slot[0][0], rng.uniform(*self.ac.burst_penalty))

    def nbest(self, ref: Sequence[str], rng: random.Random,
              clarity: float) -> list[dict[str, object]]:
        slots = self.lattice(ref, rng, clarity)
        # Per-utterance acoustic level: -20 to -40 nats a spoken word, plus an offset.
        base = -sum(rng.uniform(20.0, 40.0) for _ in ref) - rng.uniform(0.0, 60.0)
        scored = [
            sorted(
                ((words, pen, -pen + FIRST_PASS_WEIGHT * self.first_pass.logprob(words))
                 for words, pen in options),
                key=lambda o: -o[2],
            )
            for options in slots
        ]
        beam = rng.uniform(*self.ac.beam)
        out: list[dict[str, object]] = []
        seen: set[str] = set()
        best_total: float | None = None
        for path in k_best(scored, 4 * MAX_HYPOTHESES):
            words = [w for slot, k in zip(scored, path, strict=True) for w in slot[k][0]]
            text = " ".join(words)
            if not words or text in seen:
                continue
            seen.add(text)
            penalty = sum(slot[k][1] for slot, k in zip(scored, path, strict=True))
            acoustic = round(base - penalty, 2)
            lm = round(self.first_pass.logprob(words), 2)
            total = acoustic + FIRST_PASS_WEIGHT * lm
            if best_total is None:
                best_total = total
            elif total < best_total - beam:
                break
            out.append({"text": text, "acoustic": acoustic, "features": {"first_pass_lm": lm}})
            if len(out) == MAX_HYPOTHESES:
                break
        # Recompute the order from the rounded scores, as a reader of the file would.
        out.sort(key=lambda h: -(float(h["acoustic"])  # type: ignore[arg-type]
                                 + FIRST_PASS_WEIGHT * float(h["features"]["first_pass_lm"])))  # type: ignore[index]
        return out


def k_best(slots: Sequence[Sequence[tuple[tuple[str, ...], float, float]]],
           k: int) -> Iterable[tuple[int, ...]]:
    """The k highest-scoring choices of one option per slot, best first (options sorted)."""
    start = tuple(0 for _ in slots)

    def score(path: tuple[int, ...]) -> float:
        return sum(slot[j][2] for slot, j in zip(slots, path, strict=True))

    heap = [(-score(start), start)]
    seen = {start}
    for _ in range(k):
        if not heap:
            return
        _, path = heapq.heappop(heap)
        yield path
        for pos, j in enumerate(path):
            if j + 1 < len(slots[pos]):
                nxt = (*path[:pos], j + 1, *path[pos + 1:])
                if nxt not in seen:
                    seen.add(nxt)
                    heapq.heappush(heap, (-score(nxt), nxt))


class Unigram:
    """The weak generic first-pass model: add-one unigram of everyday text (ln)."""

    def __init__(self, sentences: Iterable[str]):
        self.counts: Counter[str] = Counter(w for s in sentences for w in s.split())
        self.total = sum(self.counts.values())
        self.denominator = self.total + len(self.counts) + 1  # +1: the unknown word

    def logprob(self, words: Sequence[str]) -> float:
        return sum(math.log((self.counts.get(w, 0) + 1) / self.denominator) for w in words)


# ---------------------------------------------------------------------------------------
# Putting it together


def unique_sentences(grammar: Grammar, rng: random.Random, n: int, avoid: set[str]) -> list[str]:
    out: list[str] = []
    taken = set(avoid)
    while len(out) < n:
        s = grammar.sentence(rng)
        if s not in taken:
            taken.add(s)
            out.append(s)
    return out


def sentences(grammar: Grammar, rng: random.Random, n: int, avoid: set[str]) -> list[str]:
    """n sentences (repeats allowed, as in a real logbook), none of them in ``avoid``."""
    out: list[str] = []
    while len(out) < n:
        s = grammar.sentence(rng)
        if s not in avoid:
            out.append(s)
    return out


def nbest_records(split: str, refs: Sequence[str], recognizer: Recognizer,
                  rng: random.Random) -> list[str]:
    lines = []
    for i, ref in enumerate(refs, start=1):
        speaker = rng.choice(SPEAKERS)
        shift = rng.choice(tuple(SHIFT_NOISE))
        clarity = speaker.clarity * SHIFT_NOISE[shift]
        record = {
            "id": f"lark-{split}-{i:04d}",
            "reference": ref,
            "hypotheses": recognizer.nbest(ref.split(), rng, clarity),
            "meta": {"speaker": speaker.name, "shift": shift},
        }
        lines.append(json.dumps(record, ensure_ascii=False))
    return lines


def readme(sizes: Sizes, seed: int, small: bool) -> str:
    flag = " --small" if small else ""
    return f"""# Larkspur Growhouse demo data

Invented data for `rescore demo`: the crew of a fictional vertical farm dictate their logbook.
Every sentence comes from the grammars in `scripts/make_demo_data.py`; no outside text.

- `train.txt`: {sizes.train} in-domain logbook sentences for LM training (repeats allowed).
- `dev.txt`: {sizes.dev_text} held-out in-domain sentences, none in `train.txt`.
- `background.txt`: {sizes.background} general-English sentences from a second grammar:
  everyday talk, part of which shares words with the logbook (numbers, times, plants, pumps,
  shifts), so a general model knows some of what the crew say.
- `dev.jsonl`, `test.jsonl`: {sizes.nbest} N-best lists each (contract format, 1 to
  {MAX_HYPOTHESES} hypotheses, `meta` = speaker and shift). Their references occur in no text
  file above. They come from a simulated recognizer: a confusion table of sound-alike words,
  filler insertions and function-word deletions, each with an acoustic penalty (nats) drawn
  from a normal distribution that overlaps zero, plus occasional noise bursts. Hypotheses are
  ordered by `acoustic + {FIRST_PASS_WEIGHT} * features.first_pass_lm`, where `first_pass_lm`
  is the natural-log score of a generic add-one unigram model of everyday text (the
  recognizer vendor's, not shipped: the everyday part of the same grammar); the list
  is cut to a beam, so the true transcript is sometimes missing.

Regenerate (seed {seed}, deterministic):

    python scripts/make_demo_data.py --out fixtures/demo --seed {seed}{flag}
"""


def generate(out: Path, seed: int = DEFAULT_SEED, small: bool = False) -> dict[str, int]:
    """Write every demo file into ``out``; returns the line count of each."""
    sizes = SMALL if small else FULL
    out.mkdir(parents=True, exist_ok=True)

    def stream(name: str) -> random.Random:
        return random.Random(f"{seed}/{name}")

    test_refs = unique_sentences(DOMAIN, stream("test-refs"), sizes.nbest, set())
    dev_refs = unique_sentences(DOMAIN, stream("dev-refs"), sizes.nbest, set(test_refs))
    held = set(test_refs) | set(dev_refs)
    dev_text = unique_sentences(DOMAIN, stream("dev-text"), sizes.dev_text, held)
    train = sentences(DOMAIN, stream("train"), sizes.train, held | set(dev_text))
    vendor_text = sentences(EVERYDAY, stream("background"), sizes.background, set())
    background = sentences(BACKGROUND, stream("general"), sizes.background, set())

    recognizer = Recognizer(Unigram(vendor_text))
    files = {
        "train.txt": train,
        "dev.txt": dev_text,
        "background.txt": background,
        "dev.jsonl": nbest_records("dev", dev_refs, recognizer, stream("dev-nbest")),
        "test.jsonl": nbest_records("test", test_refs, recognizer, stream("test-nbest")),
    }
    for name, lines in files.items():
        write_text_atomic(out / name, "".join(line + "\n" for line in lines))
    write_text_atomic(out / "README.md", readme(sizes, seed, small))
    return {name: len(lines) for name, lines in files.items()}


def main(argv: Sequence[str] | None = None) -> int:
    parser = argparse.ArgumentParser(description=__doc__.split("\n\n")[0])
    parser.add_argument("--out", type=Path, default=ROOT / "fixtures" / "demo",
                        help="output folder (default fixtures/demo)")
    parser.add_argument("--seed", type=int, default=DEFAULT_SEED, help="random seed")
    parser.add_argument("--small", action="store_true", help="a few hundred lines, for tests")
    args = parser.parse_args(argv)
    counts = generate(args.out, args.seed, args.small)
    for name, n in counts.items():
        print(f"{args.out / name}: {n} lines")
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
