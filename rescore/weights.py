"""The weights of the combined score and the weights file: the one owner of both.

The combined score of a hypothesis is
``acoustic_scale * acoustic + lm_weight * lm + insertion_penalty * words + sum w_k f_k``;
a :class:`Weights` holds those numbers, and the weights file (the contract's
``weights.json``) holds them with the provenance of the run that tuned them. Every other
module reads, writes and serialises weights through here.
"""

from __future__ import annotations

import json
import math
from collections.abc import Mapping
from dataclasses import dataclass, field
from pathlib import Path
from typing import Annotated, Any, Literal

import numpy as np
from pydantic import AfterValidator, BaseModel, ConfigDict, Field, ValidationError
from pydantic_core import PydanticCustomError

from rescore.decode.confidence import IsotonicCalibration
from rescore.errors import InputError
from rescore.limits import WEIGHTS_FILE_LIMIT
from rescore.outputs import write_text_atomic
from rescore.readers import read_json

ACOUSTIC = "acoustic"
LM = "lm"
WORDS = "words"
COLUMNS = (ACOUSTIC, LM, WORDS)  # the fixed columns of the feature matrix, in order
# the weights file's keys for the fixed columns: spelled here only, imported everywhere else
ACOUSTIC_SCALE = "acoustic_scale"
LM_WEIGHT = "lm_weight"
INSERTION_PENALTY = "insertion_penalty"


@dataclass(frozen=True)
class Weights:
    """The weights of the combined score (the contract's weights file, less provenance)."""

    acoustic_scale: float = 1.0
    lm_weight: float = 0.0
    insertion_penalty: float = 0.0
    features: Mapping[str, float] = field(default_factory=dict)
    # --- decoding (rescore.decode): optional; a file without them reads and writes as before
    posterior_scale: float | None = None  # s of p(h) ~ exp(s * total(h)), fitted by tune
    calibration: Mapping[str, Any] | None = None  # posterior -> P(correct), IsotonicCalibration
    choose: str | None = None  # the choice rule tune picked (best, min-risk, consensus)
    # --- end decoding

    def vector(self, names: tuple[str, ...]) -> np.ndarray:
        """The weight of each column named in ``names`` (a feature absent here weighs 0)."""
        fixed = {ACOUSTIC: self.acoustic_scale, LM: self.lm_weight, WORDS: self.insertion_penalty}
        return np.array(
            [fixed[n] if n in fixed else float(self.features.get(n, 0.0)) for n in names],
            dtype=np.float64,
        )

    @classmethod
    def from_vector(cls, names: tuple[str, ...], vector: np.ndarray) -> Weights:
        values = dict(zip(names, (float(v) for v in vector), strict=True))
        return cls(
            acoustic_scale=values.pop(ACOUSTIC, 1.0),
            lm_weight=values.pop(LM, 0.0),
            insertion_penalty=values.pop(WORDS, 0.0),
            features=values,
        )

    def to_dict(self) -> dict[str, Any]:
        """The weights as the weights file spells them (without provenance)."""
        out: dict[str, Any] = {ACOUSTIC_SCALE: self.acoustic_scale,
                               LM_WEIGHT: self.lm_weight,
                               INSERTION_PENALTY: self.insertion_penalty,
                               "features": dict(self.features)}
        out.update(_decoding_dict(self))
        return out

    @classmethod
    def from_dict(cls, data: Mapping[str, Any], *, path: str | Path = "") -> Weights:
        """Weights from a mapping of the weights file's keys, checked strictly (see
        :func:`read_weights`); ``path`` names the source in errors."""
        return _from_dict(data, str(path))


_WEIGHT_KEYS = (ACOUSTIC_SCALE, LM_WEIGHT, INSERTION_PENALTY)
_DECODING_KEYS = ("posterior_scale", "calibration", "choose")
_FILE_KEYS = (*_WEIGHT_KEYS, "features", *_DECODING_KEYS, "provenance")

FiniteFloat = Annotated[float, Field(allow_inf_nan=False)]


def _not_reserved(features: dict[str, float]) -> dict[str, float]:
    for name in features:
        if name in COLUMNS:
            raise PydanticCustomError("reserved", "{reason}", {
                "reason": f"{name!r} is a reserved column, not a feature", "key": name})
    return features


def _calibration(raw: dict[str, Any]) -> dict[str, Any]:
    try:
        IsotonicCalibration.from_dict(raw)
    except (ValueError, TypeError, KeyError) as exc:
        raise PydanticCustomError("calibration", "{reason}",
                                  {"reason": str(exc).strip("'")}) from None
    return raw


class WeightsFile(BaseModel):
    """The weights file, validated strictly: unknown keys, missing weights, values that are
    not finite numbers are errors (:func:`read_weights` turns the first into one line)."""

    model_config = ConfigDict(extra="forbid", strict=True, frozen=True)

    acoustic_scale: FiniteFloat
    lm_weight: FiniteFloat
    insertion_penalty: FiniteFloat
    features: Annotated[dict[str, FiniteFloat], AfterValidator(_not_reserved)] = {}
    posterior_scale: Annotated[float, Field(ge=0, allow_inf_nan=False)] | None = None
    calibration: Annotated[dict[str, Any], AfterValidator(_calibration)] | None = None
    choose: Literal["best", "min-risk", "consensus"] | None = None
    provenance: dict[str, Any] | None = None

    def weights(self) -> Weights:
        return Weights(acoustic_scale=self.acoustic_scale, lm_weight=self.lm_weight,
                       insertion_penalty=self.insertion_penalty, features=dict(self.features),
                       posterior_scale=self.posterior_scale, calibration=self.calibration,
                       choose=self.choose)


def _decoding_dict(weights: Weights) -> dict[str, Any]:
    """The decoding keys that are set (none for weights tuned before them)."""
    out: dict[str, Any] = {}
    if weights.posterior_scale is not None:
        out["posterior_scale"] = weights.posterior_scale
    if weights.calibration is not None:
        out["calibration"] = dict(weights.calibration)
    if weights.choose is not None:
        out["choose"] = weights.choose
    return out


def _message(error: Any) -> tuple[str, str]:
    """(field, message) of one validation error, in the weights file's words."""
    loc = [str(part) for part in error["loc"] if not str(part).startswith(("function-", "dict["))]
    kind, value = error["type"], error.get("input")
    if kind == "reserved":
        return f"features.{error['ctx']['key']}", str(error["msg"])
    field = ".".join(loc)
    if kind == "extra_forbidden":
        return field, f"unknown key; expected {', '.join(_FILE_KEYS)}"
    if kind == "missing":
        return field, "missing"
    if kind == "finite_number":
        return field, "must be a finite number"
    if kind == "greater_than_equal":
        return field, "must be non-negative"
    if kind == "literal_error":
        return field, f"expected best, min-risk or consensus, got {json.dumps(value)}"
    if kind == "dict_type":
        what = {"features": "an object of feature weights",
                "calibration": "an object with method, x and y"}.get(field, "an object")
        return field, f"expected {what}"
    if kind == "calibration":
        return field, str(error["msg"])
    return field, f"expected a number, got {json.dumps(value, default=str)}"


def _number(value: object, path: str, name: str) -> float:
    if isinstance(value, bool) or not isinstance(value, int | float):
        raise InputError(f"expected a number, got {json.dumps(value)}", path=path, field=name)
    if not math.isfinite(value):
        raise InputError("must be a finite number", path=path, field=name)
    return float(value)


def _reject_constant(token: str) -> float:
    raise ValueError(f"{token} is not a number in JSON")


def read_weights(path: str | Path) -> Weights:
    """Read a weights file, strictly: unknown keys, non-numbers and NaN are errors.

    Parameters
    ----------
    path : str or Path
        The weights file (as ``rescore tune`` writes it).

    Returns
    -------
    Weights
        The weights (the file's provenance is not part of them).

    Raises
    ------
    InputError
        A key unknown or missing, a value not a finite number, or bad JSON.

    Examples
    --------
    >>> import tempfile, pathlib
    >>> path = pathlib.Path(tempfile.mkdtemp()) / "w.json"
    >>> write_weights(path, Weights(lm_weight=9.0), {})
    >>> read_weights(path).lm_weight
    9.0
    """
    where = str(path)
    try:
        data = read_json(path, WEIGHTS_FILE_LIMIT, parse_constant=_reject_constant)
    except ValueError as exc:  # NaN or Infinity
        raise InputError(str(exc), path=where) from None
    return _from_dict(data, where)


def _from_dict(data: object, where: str) -> Weights:
    if not isinstance(data, dict):
        raise InputError("expected a JSON object", path=where)
    try:
        return WeightsFile.model_validate(data).weights()
    except ValidationError as exc:
        errors = exc.errors(include_url=False)
        # a misspelt key is the likeliest fix, then a missing weight, then the first value
        rank = {"extra_forbidden": 0, "missing": 1}
        first = min(errors, key=lambda e: (rank.get(e["type"], 2),
                                           str(e["loc"][0]) if rank.get(e["type"]) == 0
                                           else ""))
        field, message = _message(first)
        raise InputError(message, path=where, field=field) from None


def read_weights_provenance(path: str | Path) -> dict[str, Any]:
    """The provenance object of a weights file (empty when it has none)."""
    try:
        data = read_json(path, WEIGHTS_FILE_LIMIT, parse_constant=_reject_constant)
    except ValueError as exc:
        raise InputError(str(exc), path=str(path)) from None
    prov = data.get("provenance") if isinstance(data, dict) else None
    return prov if isinstance(prov, dict) else {}


def read_weights_models(path: str | Path) -> dict[str, str]:
    """The SHA-256 of each model the weights were tuned with, by name, as the weights
    file's provenance records them (empty when it records none)."""
    where = str(path)
    models = read_weights_provenance(path).get("models")
    if not isinstance(models, dict):
        return {}
    out = {}
    for name, record in models.items():
        digest = record.get("sha256") if isinstance(record, dict) else None
        if not isinstance(digest, str):
            raise InputError("expected the model's sha256 as a string", path=where,
                             field=f"provenance.models.{name}.sha256")
        out[str(name)] = digest
    return out


def write_weights(path: str | Path, weights: Weights, provenance: Mapping[str, Any]) -> None:
    """Write a weights file atomically (nothing appears at ``path`` on failure).

    Parameters
    ----------
    path : str or Path
        Where to write.
    weights : Weights
        The weights.
    provenance : mapping
        How they were made (package version, data and model checksums, search).

    Returns
    -------
    None

    Raises
    ------
    InputError
        A weight that is not a finite number.
    OutputError
        The file could not be written whole.

    Examples
    --------
    >>> import tempfile, pathlib
    >>> write_weights(pathlib.Path(tempfile.mkdtemp()) / "w.json", Weights(), {"note": "x"})
    """
    write_text_atomic(path, weights_text(path, weights, provenance))


def weights_text(path: str | Path, weights: Weights, provenance: Mapping[str, Any]) -> str:
    """The text of the weights file to be written at ``path`` (named in its errors)."""
    body = weights.to_dict()
    for key in _WEIGHT_KEYS:
        _number(body[key], str(path), key)
    for name, value in body["features"].items():
        _number(value, str(path), f"features.{name}")
    if "posterior_scale" in body:
        _number(body["posterior_scale"], str(path), "posterior_scale")
    return json.dumps({**body, "provenance": dict(provenance)}, indent=2, sort_keys=False,
                      allow_nan=False) + "\n"
