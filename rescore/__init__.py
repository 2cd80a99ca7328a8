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
from rescore.errors import (
    GateError,
    InputError,
    ModelFileError,
    ParameterError,
    RescoreError,
    UsageError,
)
from rescore.lm import NGramModel
from rescore.version import __version__
from rescore.weights import Weights, read_weights, write_weights

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
