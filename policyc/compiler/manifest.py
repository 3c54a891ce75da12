"""Pydantic model of a rule artefact's manifest: the compiler builds manifests through it,
and ``schemas/rule-manifest.schema.json`` is generated from it. The runtime reads the
manifest without pydantic (it checks the fields it needs by hand)."""

from __future__ import annotations

from typing import Any, Literal

from pydantic import BaseModel, ConfigDict, Field

__all__ = ["RuleManifest"]


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
    arrays: dict[str, list[int]] | None = Field(default=None, description="array name -> shape")
    content_sha256: str | None = Field(default=None, pattern=r"^[0-9a-f]{64}$")
