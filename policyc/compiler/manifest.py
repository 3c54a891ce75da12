"""Pydantic model of a rule artefact's manifest: the compiler builds manifests through it,
and ``schemas/rule-manifest.schema.json`` is generated from it. The runtime reads the
manifest without pydantic (it checks the fields it needs by hand)."""

from __future__ import annotations

from typing import Any, Literal

from pydantic import BaseModel, ConfigDict, Field

__all__ = ["LimitFigures", "LimitsRecord", "NoveltyRecord", "RuleManifest"]


class LimitFigures(BaseModel):
    """One operating limit as solved on the reference data."""

    model_config = ConfigDict(frozen=True, extra="forbid")

    kind: Literal["max_share", "min_recall"]
    subject: str = Field(description="the capped action, or the class whose recall is floored")
    actions: list[str] = Field(description="the capped action, or the actions that count as catching the class")
    share: float = Field(description="the stated limit")
    multiplier: float = Field(ge=0.0, description="μ_j added to the entries the limit concerns")
    rows: int = Field(ge=1, description="reference rows the limit is judged on")
    count: int = Field(ge=0, description="rows receiving the action / class rows caught")
    rate: float = Field(description="count / rows on the reference data under the limited rule")
    bound: float = Field(description="one-sided Clopper-Pearson bound at per_limit_confidence: upper for max_share")
    alone_multiplier: float = Field(ge=0.0, description="the multiplier with this limit alone")
    price: float = Field(ge=0.0, description="expected loss per row, this limit alone minus no limit")


class NoveltyRecord(BaseModel):
    """Novelty reject: rows whose squared Mahalanobis distance to every class with a non-zero prior exceeds the
    threshold are deferred."""

    model_config = ConfigDict(frozen=True, extra="forbid")

    coverage: float = Field(gt=0.0, lt=1.0, description="stated share of each fitted class inside its region")
    degrees_of_freedom: int = Field(ge=1, description="d, the number of features")
    threshold: float = Field(gt=0.0, description="χ²_d quantile at coverage (scipy.stats.chi2.ppf)")


class LimitsRecord(BaseModel):
    """Operating limits solved into the rule: the stated matrix, the multipliers, L' and the figures."""

    model_config = ConfigDict(frozen=True, extra="forbid")

    data: str
    data_sha256: str = Field(pattern=r"^[0-9a-f]{64}$")
    label: str | None
    rows: int
    invalid_rows: int
    confidence: float
    per_limit_confidence: float = Field(description="1 - (1 - confidence) / m (Bonferroni over m limits)")
    sweeps: int = Field(description="sweeps of the monotone iteration until no multiplier rose")
    stated_loss: dict[str, dict[str, float]] = Field(description="loss[action][class] as stated, reject row last")
    adjusted_loss: dict[str, dict[str, float]] = Field(description="L' = L + Σ_j μ_j M_j, the matrix the rule uses")
    expected_loss_unlimited: float
    expected_loss_limited: float
    price: float = Field(description="expected loss per row, all limits minus no limit (stated matrix)")
    limits: list[LimitFigures]


class RuleManifest(BaseModel):
    """What a compiled rule says about itself. ``arrays`` and ``content_sha256`` are added when encoding."""

    model_config = ConfigDict(frozen=True, extra="forbid")

    format: Literal["policyc-rule"]
    format_version: str = Field(pattern=r"^\d+\.\d+$")
    policy: str
    revision: int = Field(ge=0)
    description: str | None
    classes: list[str] = Field(min_length=2)
    actions: list[str] = Field(min_length=1, description="the policy's actions, then the reject action if any")
    reject_action: str | None
    reject_cost: float | None = Field(description="on the loss scale (the negative of a stated reject gain)")
    features: list[str] = Field(min_length=1, description="input columns in order")
    priors: dict[str, float] = Field(description="deployment priors, normalised")
    priors_source: Literal["policy", "training"]
    training_class_counts: dict[str, int] | None
    training_priors: dict[str, float] | None
    loss_stated_as: Literal["loss", "gain"]
    loss_unit: str | None
    invalid_input: Literal["reject", "error"]
    evidence: dict[str, Any] = Field(description="evidence kind and its settings, e.g. shrinkage intensities")
    policy_sha256: str = Field(pattern=r"^[0-9a-f]{64}$")
    training_sha256: str | None = Field(pattern=r"^[0-9a-f]{64}$")
    policyc_version: str
    limits: LimitsRecord | None = Field(default=None, description="present when the policy states limits:")
    novelty: NoveltyRecord | None = Field(default=None, description="present when the policy states reject.novelty")
    arrays: dict[str, list[int]] | None = Field(default=None, description="array name -> shape")
    content_sha256: str | None = Field(default=None, pattern=r"^[0-9a-f]{64}$")
