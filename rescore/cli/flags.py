"""The one table from the library's parameter names to the command line's flag names.

Library errors (:class:`rescore.errors.ParameterError`) name the Python parameter that is
wrong (``lm_grid``); the command line shows the flag a user typed (``--grid-lm``) instead.
"""

from __future__ import annotations

from rescore.errors import ParameterError, RescoreError

FLAGS: dict[str, str] = {
    "lm_grid": "--grid-lm",
    "penalty_grid": "--grid-penalty",
    "cv_warn": "--warn-cv-gap",
    "features": "--feature",
    "search": "--search",
    "bounds": "--bounds",
    "weights": "--weights",
    "tune_on": "--tune-on",
    "lm": "--lm",
    "refs_path": "--refs",
    "cluster": "--cluster",
    "quantize": "--quantize",
    "unit": "--unit",
    "choose": "--choose",
    "rules": "--rules",
}


def in_flags(exc: RescoreError) -> str:
    """The error's one line, with a parameter's name shown as its command-line flag."""
    if not isinstance(exc, ParameterError) or exc.field not in FLAGS:
        return str(exc)
    shown = ParameterError(exc.message, path=exc.path, line=exc.line, field=FLAGS[exc.field])
    return str(shown)
