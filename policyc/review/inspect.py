"""What `policyc inspect` reports about a rule: manifest facts, the loss table, two-class thresholds."""

from __future__ import annotations

import json
from typing import Any

import numpy as np
from pydantic.dataclasses import dataclass

from policyc.geometry.intervals import posterior_intervals
from policyc.render import format_matrix, limits_text
from policyc.review.shared.reports import REPORT_CONFIG
from policyc.runtime import Rule

__all__ = ["Inspection", "PosteriorInterval", "inspection", "render_inspection"]


@dataclass(frozen=True, config=REPORT_CONFIG)
class PosteriorInterval:
    """Two classes: the action taken for P(posterior_of | x) in [low, high]."""

    posterior_of: str
    low: float
    high: float
    action: str


@dataclass(frozen=True, config=REPORT_CONFIG)
class Inspection:
    """What ``policyc inspect`` reports; its JSON is this object (schemas/inspect-report.schema.json)."""

    policy: str | None
    revision: int | None
    format_version: str | None
    policyc_version: str | None
    content_sha256: str | None
    policy_sha256: str | None
    training_sha256: str | None
    priors_source: str | None
    invalid_input: str | None
    loss_unit: str | None
    reject_action: str | None
    reject_cost: float | None
    classes: tuple[str, ...]
    actions: tuple[str, ...]
    features: tuple[str, ...]
    priors: dict[str, float]
    training_class_counts: dict[str, int] | None
    evidence: dict[str, Any]
    loss: dict[str, dict[str, float]]
    posterior_intervals: tuple[PosteriorInterval, ...] | None  # two classes only
    limits: dict[str, Any] | None = None  # the manifest's record of solved operating limits (loss is then L')
    novelty: dict[str, Any] | None = None  # coverage, degrees of freedom and χ² threshold of the novelty reject


_FACTS = (
    "policy",
    "revision",
    "format_version",
    "policyc_version",
    "content_sha256",
    "policy_sha256",
    "training_sha256",
    "priors_source",
    "invalid_input",
    "loss_unit",
    "reject_action",
    "reject_cost",
)


def inspection(rule: Rule) -> Inspection:
    """The report; ``posterior_intervals`` only for two classes."""
    manifest = rule.manifest
    intervals = None
    if len(rule.classes) == 2:
        intervals = tuple(
            PosteriorInterval(rule.classes[1], i.low, i.high, rule.actions[i.action])
            for i in posterior_intervals(np.asarray(rule.params["loss"]))
        )
    facts: dict[str, Any] = {key: manifest.get(key) for key in _FACTS}
    return Inspection(
        **facts,
        classes=rule.classes,
        actions=rule.actions,
        features=rule.features,
        priors=manifest["priors"],
        training_class_counts=manifest.get("training_class_counts"),
        evidence=manifest["evidence"],
        loss={
            a: dict(zip(rule.classes, row, strict=True))
            for a, row in zip(rule.actions, rule.params["loss"].tolist(), strict=True)
        },
        posterior_intervals=intervals,
        limits=manifest.get("limits"),
        novelty=manifest.get("novelty"),
    )


def render_inspection(rule: Rule, report: Inspection) -> str:
    lines = [f"{key}: {getattr(report, key)}" for key in _FACTS if getattr(report, key) is not None]
    lines.append(f"features: {', '.join(rule.features)}")
    lines.append("priors: " + ", ".join(f"{c}={report.priors[c]:.6g}" for c in rule.classes))
    if report.training_class_counts:
        lines.append("training rows: " + ", ".join(f"{c}={report.training_class_counts[c]}" for c in rule.classes))
    lines.append("evidence: " + json.dumps(report.evidence, sort_keys=True))
    unit = f" ({report.loss_unit})" if report.loss_unit else ""
    adjusted = " (the adjusted matrix L' of the limits below)" if report.limits is not None else ""
    lines.append(f"\nloss{unit}, loss[action][true class] (reject row last){adjusted}:")
    lines.append(format_matrix(np.asarray(rule.params["loss"]), rule.actions, rule.classes, "action", "true class"))
    if report.posterior_intervals is not None:
        lines.append(f"\ndecision by P({rule.classes[1]} | x):")
        for interval in report.posterior_intervals:
            lines.append(f"  [{interval.low:.6g}, {interval.high:.6g}]: {interval.action}")
    if report.novelty is not None:
        novelty = report.novelty
        lines.append(
            f"\nnovelty reject: a row whose squared Mahalanobis distance to every class with a non-zero prior exceeds "
            f"{novelty['threshold']:.6g} (the χ² quantile at coverage {novelty['coverage']:g}, "
            f"{novelty['degrees_of_freedom']} degrees of freedom) goes to {report.reject_action} with reason novelty"
        )
    if report.limits is not None:
        stated = np.array([[report.limits["stated_loss"][a][c] for c in rule.classes] for a in rule.actions])
        lines.append(f"\nstated loss{unit}, before the limits:")
        lines.append(format_matrix(stated, rule.actions, rule.classes, "action", "true class"))
        lines.append("\n" + limits_text(report.limits, report.loss_unit, rule.actions, rule.classes, matrix=False))
    return "\n".join(lines)
