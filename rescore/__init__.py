"""rescore: offline N-best rescoring with n-gram language models, weight tuning and WER reports.

The whole job from Python::

    import rescore
    model = rescore.build_model(Path("train.txt"))
    result = rescore.tune("dev.jsonl", lm=model)
    rescored = rescore.apply("test.jsonl", result.weights, lm=model)
    print(rescore.wer(rescored).wer)

Each name below has its own documentation (``help(rescore.tune)``).
"""

from rescore.api import (
    apply,
    apply_file,
    build_model,
    load_model,
    read_nbest,
    report,
    save_model,
    tune,
    wer,
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
    "report",
    "save_model",
    "tune",
    "wer",
    "write_weights",
]
