"""Caps on hostile or broken input, in one place (README "Guarantees").

Each breach ends a command with a one-line error naming the file; the readers that apply
them live in :mod:`rescore.readers` and :mod:`rescore.compression`.
"""

from __future__ import annotations

# One line of text (a corpus sentence, a reference, an ARPA entry): far beyond any sentence.
TEXT_LINE_LIMIT = 8 << 20
# JSON files read whole: a weights file holds a few numbers and its provenance; a tuning
# analysis file holds the error surface (about 16 bytes a grid cell: 4 million cells fit).
WEIGHTS_FILE_LIMIT = 16 << 20
ANALYSIS_FILE_LIMIT = 64 << 20
# Nesting reported when a JSON file is too deep to parse (the files above need a handful).
JSON_DEPTH_REPORTED = 100
# Blank lines skipped in a row by every line reader: a file of nothing but line breaks
# (a few MB of gzip unpack to billions of them) is refused instead of read for hours.
BLANK_RUN_LIMIT = 1_000_000
# A gzip input may unpack to this many times its compressed size (and to this floor
# whatever its size). Real N-best lists and corpus text unpack to 7 to 10 times (measured
# on the demo data and the recognizer sample); gzip's ceiling is about 1,030 times.
GZIP_RATIO_LIMIT = 100
GZIP_FLOOR_BYTES = 16 << 20
GZIP_RATIO_VARIABLE = "RESCORE_GZIP_MAX_RATIO"


def describe_size(n: int) -> str:
    """A limit as users read it: whole MiB where it is one, else bytes."""
    return f"{n >> 20} MiB" if n >= 1 << 20 and n % (1 << 20) == 0 else f"{n} bytes"

# Largest score magnitude a weight search accepts in a column it weights: its box holds
# weights up to 100 by default, and a total sums a handful of columns, so the products
# and their sum stay far from float64's 1.8e308 (1e300 * 100 * 1000 columns < 1e306).
TUNING_SCORE_LIMIT = 1e300

# A batch of records (apply, check, wer, tune's reading) closes once its records hold this
# much text, whatever --batch-size says, so peak memory has a ceiling however long the
# lines are (README "Large jobs").
BATCH_BYTE_LIMIT = 8 << 20
