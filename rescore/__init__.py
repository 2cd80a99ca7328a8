"""rescore: offline N-best rescoring with n-gram language models, weight tuning and WER reports."""

from rescore.errors import GateError, InputError, ModelFileError, RescoreError, UsageError

__version__ = "0.1.0"

__all__ = [
    "GateError",
    "InputError",
    "ModelFileError",
    "RescoreError",
    "UsageError",
    "__version__",
]
