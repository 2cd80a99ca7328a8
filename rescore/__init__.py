"""rescore: offline N-best rescoring with n-gram language models, weight tuning and WER reports.

The whole job from Python::

    import rescore
    model = rescore.build_model(Path("train.txt"))
    result = rescore.tune_weights("dev.jsonl", lm=model)
    rescored = rescore.apply("test.jsonl", result.weights, lm=model)
    print(rescore.word_error_rate(rescored).wer)

Each name below has its own documentation (``help(rescore.tune_weights)``); the names differ from
the subpackages ``rescore.tune``, ``rescore.report`` and ``rescore.wer`` on purpose.
"""

from __future__ import annotations

from typing import TYPE_CHECKING, Any

from rescore.errors import (
    GateError,
    InputError,
    ModelFileError,
    ParameterError,
    RescoreError,
    UsageError,
)
from rescore.version import __version__

if TYPE_CHECKING:
    from rescore.api import (
        apply,
        apply_file,
        build_model,
        load_model,
        read_nbest,
        release_report,
        save_model,
        tune_weights,
        word_error_rate,
    )
    from rescore.lm import NGramModel
    from rescore.weights import Weights, read_weights, write_weights

_API = {"apply", "apply_file", "build_model", "load_model", "read_nbest", "release_report",
        "save_model", "tune_weights", "word_error_rate"}
_WEIGHTS = {"Weights", "read_weights", "write_weights"}


def __getattr__(name: str) -> Any:
    """The API's names are imported on first use (PEP 562): ``import rescore.lm`` and the
    ``rescore lm`` commands then load the language-model code alone, not the whole
    package (see tests/test_architecture.py for the time this saves)."""
    if name in _API:
        import rescore.api
        value = getattr(rescore.api, name)
    elif name in _WEIGHTS:
        import rescore.weights
        value = getattr(rescore.weights, name)
    elif name == "NGramModel":
        import rescore.lm
        value = rescore.lm.NGramModel
    else:
        raise AttributeError(f"module 'rescore' has no attribute {name!r}")
    globals()[name] = value
    return value


def __dir__() -> list[str]:
    return sorted(set(globals()) | set(__all__))


__all__ = [
    "GateError",
    "InputError",
    "ModelFileError",
    "NGramModel",
    "ParameterError",
    "RescoreError",
    "UsageError",
    "Weights",
    "__version__",
    "apply",
    "apply_file",
    "build_model",
    "load_model",
    "read_nbest",
    "read_weights",
    "release_report",
    "save_model",
    "tune_weights",
    "word_error_rate",
    "write_weights",
]
