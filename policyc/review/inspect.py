"""What `policyc inspect` reports about a rule: manifest facts, the loss table, two-class thresholds."""

from __future__ import annotations

import json
from typing import Any

import numpy as np

from policyc.geometry.intervals import posterior_intervals
from policyc.render import format_matrix
from policyc.runtime import Rule

__all__ = ["inspection", "render_inspection"]

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


def inspection(rule: Rule) -> dict[str, Any]:
    """A JSON-ready report; ``posterior_intervals`` only for two classes."""
    manifest = rule.manifest
    report: dict[str, Any] = {key: manifest.get(key) for key in _FACTS}
    report |= {
        "classes": list(rule.classes),
        "actions": list(rule.actions),
        "features": list(rule.features),
        "priors": manifest["priors"],
        "training_class_counts": manifest.get("training_class_counts"),
        "evidence": manifest["evidence"],
        "loss": {
            a: dict(zip(rule.classes, row, strict=True))
            for a, row in zip(rule.actions, rule.params["loss"].tolist(), strict=True)
        },
    }
    if len(rule.classes) == 2:
        report["posterior_intervals"] = [
            {"posterior_of": rule.classes[1], "low": i.low, "high": i.high, "action": rule.actions[i.action]}
            for i in posterior_intervals(np.asarray(rule.params["loss"]))
        ]
    return report


def render_inspection(rule: Rule, report: dict[str, Any]) -> str:
    lines = [f"{key}: {report[key]}" for key in _FACTS if report.get(key) is not None]
    lines.append(f"features: {', '.join(rule.features)}")
    lines.append("priors: " + ", ".join(f"{c}={report['priors'][c]:.6g}" for c in rule.classes))
    if report["training_class_counts"]:
        lines.append("training rows: " + ", ".join(f"{c}={report['training_class_counts'][c]}" for c in rule.classes))
    lines.append("evidence: " + json.dumps(report["evidence"], sort_keys=True))
    unit = f" ({report['loss_unit']})" if report.get("loss_unit") else ""
    lines.append(f"\nloss{unit}, loss[action][true class] (reject row last):")
    lines.append(format_matrix(np.asarray(rule.params["loss"]), rule.actions, rule.classes, "action", "true class"))
    if "posterior_intervals" in report:
        lines.append(f"\ndecision by P({rule.classes[1]} | x):")
        for interval in report["posterior_intervals"]:
            lines.append(f"  [{interval['low']:.6g}, {interval['high']:.6g}]: {interval['action']}")
    return "\n".join(lines)
