"""Pydantic models of the policy language, and the step from located data to a Policy.

The models check shape and types only (strict: no quoted numbers, no
booleans as numbers, no unknown keys). Whether the pieces agree with each
other (priors cover the classes, losses name every action, ...) is the job
of :mod:`policyc.language.checks`, which reports every disagreement at once.
"""

from __future__ import annotations

import functools
from collections.abc import Mapping
from typing import Annotated, Any, Literal

import numpy as np
from pydantic import (
    BaseModel,
    ConfigDict,
    Field,
    StringConstraints,
    ValidationError,
    model_validator,
)

from policyc.language.diagnostics import Diagnostic, PolicySchemaError, Severity
from policyc.language.hints import did_you_mean
from policyc.language.source import SourceDocument

__all__ = [
    "Calibration",
    "CalibrationFit",
    "CalibrationScore",
    "Evidence",
    "GaussianEvidence",
    "LogLikelihoodEvidence",
    "NoveltyReject",
    "OperatingLimits",
    "Policy",
    "PosteriorEvidence",
    "RecallLimit",
    "RejectOption",
    "TrainingData",
    "build_policy",
]


# Names (classes, actions, features, columns) are text. An unquoted 7 is a number and is refused with a hint
# to quote it, never turned into "7": the same spelling would otherwise mean a number in one place and a
# name in another. No validator wraps the type, so the pattern and lengths reach the JSON Schema.
Name = Annotated[
    str,
    StringConstraints(min_length=1, max_length=200, pattern=r"^[^\s\x00-\x1f](?:[^\x00-\x1f]*[^\s\x00-\x1f])?$"),
]
Identifier = Annotated[str, StringConstraints(pattern=r"^[A-Za-z0-9][A-Za-z0-9_.-]{0,99}$")]
Sha256 = Annotated[str, StringConstraints(pattern=r"^[0-9a-f]{64}$")]
Finite = Annotated[float, Field(allow_inf_nan=False)]
Probability = Annotated[float, Field(allow_inf_nan=False)]
Matrix = dict[Name, dict[Name, Finite]]


class _Strict(BaseModel):
    model_config = ConfigDict(frozen=True, extra="forbid", strict=True)


class TrainingData(_Strict):
    """Labelled rows to fit the evidence model on."""

    data: str = Field(description="CSV or Parquet file, relative to the policy file")
    label: Name = Field(description="column that holds the class names")
    sha256: Sha256 | None = Field(default=None, description="pin the exact file content")
    ignore_unknown_labels: bool = Field(
        default=False, description="skip rows whose label is not a class instead of failing"
    )


class GaussianEvidence(_Strict):
    """Class-conditional multivariate normal densities fitted from training data."""

    kind: Literal["gaussian"]
    covariance: Literal["full", "diagonal", "tied"] = "full"
    shrinkage: Literal["none", "auto"] | Annotated[float, Field(ge=0.0, le=1.0)] = Field(
        default="none",
        description="none, auto (Ledoit-Wolf 2004 toward the scaled identity) or a fixed intensity in [0, 1]",
    )
    features: tuple[Name, ...] = Field(min_length=1)
    training: TrainingData


class CalibrationScore(_Strict):
    metric: Literal["brier", "ece", "log-loss"]
    value: Annotated[float, Field(ge=0.0, allow_inf_nan=False)]


class Calibration(_Strict):
    """How the upstream probabilities were calibrated, so a reviewer can judge them."""

    method: Literal["isotonic", "platt", "temperature", "beta", "histogram", "none"]
    data_sha256: Sha256 | None = None
    score: CalibrationScore | None = None


class CalibrationFit(_Strict):
    """Labelled data on which the compiler fits a calibration map of the upstream probabilities."""

    method: Literal["temperature", "dirichlet", "isotonic"] = Field(
        description="temperature: q ∝ p^(1/T); dirichlet: q = softmax(W ln p + b); "
        "isotonic: per class, isotonic regression of the class indicator on its probability"
    )
    data: str = Field(
        description="CSV or Parquet with the probability columns and a label column, relative to the policy"
    )
    label: Name = Field(description="column that holds the class names")
    sha256: Sha256 | None = Field(default=None, description="pin the exact file content")
    regularisation: Annotated[float, Field(ge=0.0, allow_inf_nan=False)] | None = Field(
        default=None,
        description="dirichlet only: weight of the off-diagonal and intercept penalty; 0 = plain maximum likelihood",
    )

    def minimum_rows_per_class(self, n_classes: int) -> int:
        """Fewest labelled rows of each class the method can be fitted on.

        Every class needs rows for its frequency (which replaces the trained priors); a dirichlet map has
        K + 1 parameters per class (a row of W and an intercept), so K + 1 rows per class give at least as
        many rows as parameters (common practice, no source).
        """
        return n_classes + 1 if self.method == "dirichlet" else 2


class PosteriorEvidence(_Strict):
    """Class probabilities from an upstream model, trained under other priors, calibrated upstream or here."""

    kind: Literal["posterior"]
    columns: dict[Name, Name] = Field(description="class -> column of its probability")
    trained_priors: dict[Name, Probability] | None = Field(
        default=None,
        description="class priors the upstream model was trained under (with calibrate: the calibration data's "
        "class frequencies take their place)",
    )
    calibration: Calibration | None = None
    calibrate: CalibrationFit | None = None
    sum_tolerance: Annotated[float, Field(gt=0.0, le=0.1)] = Field(
        default=1e-6, description="rows whose probabilities sum further than this from 1 are invalid"
    )
    renormalise: bool = Field(default=False, description="divide each row by its sum instead of treating it as invalid")


class LogLikelihoodEvidence(_Strict):
    """Per-class log-likelihoods log p(x | class) computed elsewhere."""

    kind: Literal["log-likelihood"]
    columns: dict[Name, Name] = Field(description="class -> column of its log-likelihood")


Evidence = Annotated[GaussianEvidence | PosteriorEvidence | LogLikelihoodEvidence, Field(discriminator="kind")]


class NoveltyReject(_Strict):
    """Also defer rows outside every class's high-density region (Gaussian evidence)."""

    coverage: Annotated[float, Field(gt=0.0, lt=1.0, allow_inf_nan=False)] = Field(
        description="share of each fitted class's probability inside its region; rows outside every region are deferred"
    )


class RejectOption(_Strict):
    """Defer to a person at a constant cost (under ``loss:``) or gain (under ``gain:``)."""

    action: Name = "reject"
    cost: Finite | None = None
    gain: Finite | None = None
    novelty: NoveltyReject | None = None

    @model_validator(mode="after")
    def _one_value(self) -> RejectOption:
        if (self.cost is None) == (self.gain is None):
            raise ValueError("state exactly one of cost: (with loss:) or gain: (with gain:)")
        return self


class RecallLimit(_Strict):
    """Of the rows truly in a class, at least ``share`` must receive one of ``actions``."""

    actions: tuple[Name, ...] = Field(min_length=1, description="actions that count as catching the class")
    share: Finite = Field(description="the least share of the class's rows, in [0, 1]")


class OperatingLimits(_Strict):
    """Capacity and recall requirements, solved into the loss matrix on reference data at compile time."""

    data: str = Field(description="CSV or Parquet rows like those the rule will decide, relative to the policy file")
    label: Name | None = Field(default=None, description="column of true classes; needed by min_recall")
    sha256: Sha256 | None = Field(default=None, description="pin the exact file content")
    confidence: Annotated[float, Field(ge=0.5, lt=1.0)] = Field(
        default=0.95, description="each limit holds on new data from the same source with at least this probability"
    )
    max_share: dict[Name, Finite] = Field(
        default_factory=dict, description="action (the reject action included) -> the largest share of rows"
    )
    min_recall: dict[Name, RecallLimit] = Field(default_factory=dict, description="class -> actions and least share")


class Policy(_Strict):
    """A decision policy: classes, priors, actions, a loss (or gain) matrix and evidence."""

    policy: Identifier = Field(description="identifier of the policy")
    revision: Annotated[int, Field(ge=0)] = 0
    description: str | None = None
    classes: tuple[Name, ...] = Field(min_length=1)
    priors: dict[Name, Probability] | Literal["training"]
    actions: tuple[Name, ...] = Field(min_length=1)
    loss: Matrix | None = Field(default=None, description="loss[action][class]")
    gain: Matrix | None = Field(default=None, description="gain[action][class], higher is better")
    loss_unit: str | None = None
    reject: RejectOption | None = None
    invalid_input: Literal["reject", "error"] = "error"
    evidence: Evidence
    limits: OperatingLimits | None = None

    @model_validator(mode="after")
    def _loss_or_gain(self) -> Policy:
        if (self.loss is None) == (self.gain is None):
            raise ValueError("state exactly one of loss: or gain: (the sign is never guessed)")
        return self

    @property
    def matrix_key(self) -> Literal["loss", "gain"]:
        return "loss" if self.loss is not None else "gain"

    @property
    def stated_matrix(self) -> Matrix:
        matrix = self.loss if self.loss is not None else self.gain
        assert matrix is not None
        return matrix

    def loss_matrix(self) -> np.ndarray:
        """Loss of each action (rows, in ``actions`` order) for each class (columns).

        Gain is turned into loss by its negative: λ(a|j) = -g(a|j).
        Assumes :mod:`policyc.language.checks` found the matrix complete.
        """
        sign = 1.0 if self.loss is not None else -1.0
        matrix = self.stated_matrix
        return sign * np.array([[matrix[a][c] for c in self.classes] for a in self.actions], dtype=float)

    def reject_cost(self) -> float | None:
        """Reject cost d on the loss scale (the negative of a stated reject gain)."""
        if self.reject is None:
            return None
        if self.reject.cost is not None:
            return self.reject.cost
        assert self.reject.gain is not None
        return -self.reject.gain


def build_policy(document: SourceDocument) -> Policy:
    """Validate located data against the model; every pydantic error becomes a located diagnostic."""
    try:
        return Policy.model_validate(document.data)
    except ValidationError as exc:
        errors = _most_specific(exc.errors(), document.data)
        diagnostics = [
            document.locate(_diagnostic_from_pydantic(error, document.data), at_key=error["type"] == "extra_forbidden")
            for error in errors
        ]
        raise PolicySchemaError(_deduplicate(diagnostics)) from None


# Errors that only say "this value is not the shape of that other union branch".
_BRANCH_MISMATCH = {"literal_error", "dict_type", "tuple_type", "float_type", "string_type", "int_type"}


def _most_specific(errors: list[Any], data: Mapping[str, Any]) -> list[Any]:
    """Drop a union-branch mismatch when a deeper error explains the same value (cf. a best match)."""
    paths = [_data_path(e["loc"], data, e["type"] == "missing") for e in errors]

    def explained(index: int) -> bool:
        path = paths[index]
        return any(len(other) > len(path) and other[: len(path)] == path for other in paths)

    return [e for i, e in enumerate(errors) if not (e["type"] in _BRANCH_MISMATCH and explained(i))]


_PYDANTIC_CODES = {
    "missing": "missing-key",
    "extra_forbidden": "unknown-key",
    "float_type": "expected-number",
    "int_type": "expected-integer",
    "string_type": "expected-text",
    "bool_type": "expected-boolean",
    "dict_type": "expected-mapping",
    "tuple_type": "expected-list",
    "finite_number": "not-finite",
    "literal_error": "unknown-choice",
    "union_tag_invalid": "unknown-evidence-kind",
    "union_tag_not_found": "missing-evidence-kind",
    "string_pattern_mismatch": "malformed-text",
    "too_short": "too-short",
    "greater_than_equal": "out-of-range",
    "less_than_equal": "out-of-range",
    "greater_than": "out-of-range",
    "less_than": "out-of-range",
    "value_error": "invalid-value",
}


def _diagnostic_from_pydantic(error: Mapping[str, Any], data: Mapping[str, Any]) -> Diagnostic:
    path = _data_path(error["loc"], data, error["type"] == "missing")
    code = _PYDANTIC_CODES.get(error["type"], "schema-" + error["type"].replace("_", "-"))
    message = str(error["msg"])
    if error["type"] == "missing":
        message = f"required key {path[-1]!r} is missing"
    elif error["type"] == "extra_forbidden":
        message = f"unknown key {path[-1]!r}" + did_you_mean(str(path[-1]), _policy_keys())
    elif error["type"] in ("float_type", "int_type") and _is_quoted_number(error.get("input")):
        message = f"{error['input']!r} is quoted, so it is text; unquote it to give the number"
    elif message.startswith("Value error, "):
        message = message.removeprefix("Value error, ")
    hint = _hint(error)
    if hint is not None:
        message = f"expected text here, not the number {error['input']}"
    return Diagnostic(code=code, severity=Severity.ERROR, message=message, path=path, hint=hint)


@functools.cache
def _policy_keys() -> frozenset[str]:
    """Every key the policy language knows, at any depth (the properties of every model)."""
    schema = Policy.model_json_schema()
    models = [schema, *schema.get("$defs", {}).values()]
    return frozenset(key for model in models for key in model.get("properties", {}))


def _is_quoted_number(value: Any) -> bool:
    if not isinstance(value, str):
        return False
    try:
        float(value)
    except ValueError:
        return False
    return True


def _hint(error: Mapping[str, Any]) -> str | None:
    """Advice for text given as a number: YAML read an unquoted 7 or 0.5 as a number."""
    value = error.get("input")
    if error["type"] == "string_type" and isinstance(value, int | float) and not isinstance(value, bool):
        return f'names and text are quoted when they look like numbers: write "{value}"'
    return None


def _data_path(loc: tuple[Any, ...], data: Any, last_is_missing: bool) -> tuple[str | int, ...]:
    """Keep the parts of pydantic's ``loc`` that are real keys of the data.

    The rest are pydantic's labels for union branches and validators ('float',
    'literal[...]', 'gaussian', '[key]'), which are no place in the file.
    """
    path: list[str | int] = []
    node = data
    for depth, part in enumerate(loc):
        found, child = _child(node, part)
        if found:
            node = child
        elif not (last_is_missing and depth == len(loc) - 1):
            continue
        path.append(part)
    return tuple(path)


def _child(node: Any, part: object) -> tuple[bool, Any]:
    """Whether ``part`` is a key (or index) of the loaded mapping (or sequence) ``node``, and its value."""
    if isinstance(node, dict) and isinstance(part, str) and part in node:
        return True, node[part]
    if isinstance(node, tuple) and isinstance(part, int) and 0 <= part < len(node):
        return True, node[part]
    return False, None


def _deduplicate(diagnostics: list[Diagnostic]) -> list[Diagnostic]:
    # A value failing every branch of a union yields one error per branch: keep one per (path, code).
    seen: set[tuple[object, ...]] = set()
    unique = []
    for diagnostic in diagnostics:
        key = (diagnostic.path, diagnostic.code)
        if key not in seen:
            seen.add(key)
            unique.append(diagnostic)
    return unique
