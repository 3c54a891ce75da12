"""Settings that differ between two policies or rules, located in both policy files where known."""

from __future__ import annotations

import math
from collections.abc import Sequence
from dataclasses import dataclass
from typing import Any

from pydantic.dataclasses import dataclass as report

from policyc.review.shared.gaussians import moments_digest
from policyc.review.shared.loading import LoadedRule
from policyc.review.shared.losses import stated_loss
from policyc.review.shared.reports import REPORT_CONFIG
from policyc.runtime import Rule

__all__ = ["SemanticChange", "plain_actions", "semantic_changes"]


@report(frozen=True, config=REPORT_CONFIG)
class SemanticChange:
    """One setting that differs, rendered ``what: old -> new``; locations are ``file:line:col`` or None."""

    what: str
    change: str
    old: str | None
    new: str | None
    old_location: str | None = None
    new_location: str | None = None


@dataclass(frozen=True)
class _Fact:
    value: Any
    path: tuple[str | int, ...]  # where it sits in a policy file (loss entries as ("loss", action, class))


def plain_actions(rule: Rule) -> tuple[str, ...]:
    return rule.actions[:-1] if rule.reject_action is not None else rule.actions


def _evidence_facts(description: dict[str, Any], prefix: str, path: tuple[str, ...]) -> dict[str, _Fact]:
    facts: dict[str, _Fact] = {}
    for key in sorted(description):
        value = description[key]
        if key == "training_label":
            facts[f"{prefix}.training.label"] = _Fact(value, ("evidence", "training", "label"))
        elif key == "shrinkage_intensity" and isinstance(value, dict):
            for name in sorted(value):
                facts[f"{prefix}.shrinkage_intensity[{name}]"] = _Fact(value[name], ("evidence", "shrinkage"))
        elif key in ("calibration", "score") and isinstance(value, dict):
            facts |= _evidence_facts(value, f"{prefix}.{key}", (*path, key))
        elif isinstance(value, dict):
            for name in sorted(value):
                facts[f"{prefix}.{key}[{name}]"] = _Fact(value[name], (*path, key, name))
        else:
            facts[f"{prefix}.{key}"] = _Fact(value, (*path, key))
    return facts


def _facts(rule: Rule) -> dict[str, _Fact]:
    """The comparable settings of a rule, keyed by what a reviewer reads, in a fixed order."""
    manifest = rule.manifest
    facts: dict[str, _Fact] = {}
    for name in rule.classes:
        facts[f"priors[{name}]"] = _Fact(manifest["priors"][name], ("priors", name))
    facts["priors (source)"] = _Fact(manifest.get("priors_source"), ("priors",))
    loss = stated_loss(rule)  # as stated; what the limits add shows as their multipliers below
    for row, action in enumerate(plain_actions(rule)):
        for column, name in enumerate(rule.classes):
            facts[f"loss[{action}][{name}]"] = _Fact(float(loss[row, column]), ("loss", action, name))
    facts["loss stated as"] = _Fact(manifest.get("loss_stated_as"), ("loss",))
    facts["reject.action"] = _Fact(rule.reject_action, ("reject", "action"))
    facts["reject.cost"] = _Fact(manifest.get("reject_cost"), ("reject", "cost"))
    novelty = manifest.get("novelty") or {}
    facts["reject.novelty.coverage"] = _Fact(novelty.get("coverage"), ("reject", "novelty", "coverage"))
    facts["invalid_input"] = _Fact(rule.invalid_input, ("invalid_input",))
    facts["loss_unit"] = _Fact(manifest.get("loss_unit"), ("loss_unit",))
    facts |= _evidence_facts(dict(manifest["evidence"]), "evidence", ("evidence",))
    facts["evidence.training.sha256"] = _Fact(manifest.get("training_sha256"), ("evidence", "training", "sha256"))
    if rule.evidence == "gaussian":  # other kinds' arrays follow from the settings listed above
        facts["evidence fit (class means and covariances, digest)"] = _Fact(moments_digest(rule), ("evidence",))
    return facts | _limit_facts(manifest.get("limits"))


def _limit_facts(record: dict[str, Any] | None) -> dict[str, _Fact]:
    """Operating limits: the stated ones, and what compile solved (multiplier, reference rate, price)."""
    if record is None:
        return {}
    facts = {
        "limits.confidence": _Fact(record["confidence"], ("limits", "confidence")),
        "limits.data sha256": _Fact(record["data_sha256"], ("limits", "data")),
    }
    for figures in record["limits"]:
        name, path = f"{figures['kind']}[{figures['subject']}]", ("limits", figures["kind"], figures["subject"])
        facts[f"limit {name}"] = _Fact(figures["share"], path if figures["kind"] == "max_share" else (*path, "share"))
        if figures["kind"] == "min_recall":
            facts[f"limit {name} actions"] = _Fact(figures["actions"], (*path, "actions"))
        for key in ("multiplier", "rate", "price"):
            facts[f"limit {name} {key}"] = _Fact(figures[key], path)
    facts["limits price (all together)"] = _Fact(record["price"], ("limits",))
    return facts


def _policy_path(loaded: LoadedRule, path: tuple[str | int, ...]) -> tuple[str | int, ...]:
    """A rule-side path as it is spelled in this policy file (a gain policy states gain: and reject gain:;
    features sit under evidence: a Gaussian's ``features`` list, other kinds' ``columns``)."""
    policy = loaded.policy
    if policy is None:
        return path
    if path[0] == "loss":
        return (policy.matrix_key, *path[1:])
    if path == ("reject", "cost") and policy.reject is not None and policy.reject.cost is None:
        return ("reject", "gain")
    if path[0] == "features":
        return ("evidence", "features" if policy.evidence.kind == "gaussian" else "columns", *path[1:])
    return path


def _locate(loaded: LoadedRule, path: tuple[str | int, ...]) -> str | None:
    """``file:line:col`` of the value at ``path`` (or its nearest stated ancestor, never the whole file)."""
    document = loaded.document
    if document is None:
        return None
    spelled = _policy_path(loaded, path)
    for depth in range(len(spelled), 0, -1):
        prefix = spelled[:depth]
        position = document.positions.get(prefix) or document.key_positions.get(prefix)
        if position is not None:
            return f"{document.name}:{position.line}:{position.column}"
    return None


def _render(value: Any) -> str | None:
    if value is None:
        return None
    if isinstance(value, bool):
        return "true" if value else "false"
    if isinstance(value, float):
        return f"{value:.10g}"
    if isinstance(value, list | tuple):
        return "[" + ", ".join(str(v) for v in value) + "]"
    return str(value)


def _same(old: Any, new: Any) -> bool:
    if isinstance(old, float | int) and isinstance(new, float | int) and not isinstance(old, bool):
        return math.isclose(float(old), float(new), rel_tol=1e-12, abs_tol=1e-15)
    return bool(old == new)


def _name_list_changes(
    old: LoadedRule, new: LoadedRule, what: str, old_names: Sequence[str], new_names: Sequence[str]
) -> list[SemanticChange]:
    path = (what,)
    changes = []
    for index, name in enumerate(old_names):
        if name not in new_names:
            changes.append(SemanticChange(what, "removed", name, None, _locate(old, (*path, index)), None))
    for index, name in enumerate(new_names):
        if name not in old_names:
            changes.append(SemanticChange(what, "added", None, name, None, _locate(new, (*path, index))))
    if not changes and tuple(old_names) != tuple(new_names):
        changes.append(
            SemanticChange(
                f"{what} (order)",
                "reordered",
                _render(old_names),
                _render(new_names),
                _locate(old, path),
                _locate(new, path),
            )
        )
    return changes


def semantic_changes(old: LoadedRule, new: LoadedRule) -> list[SemanticChange]:
    """Every setting that differs between the two sides, classes/actions/features first."""
    changes = _name_list_changes(old, new, "classes", old.rule.classes, new.rule.classes)
    changes += _name_list_changes(old, new, "actions", plain_actions(old.rule), plain_actions(new.rule))
    changes += _name_list_changes(old, new, "features", old.rule.features, new.rule.features)
    old_facts, new_facts = _facts(old.rule), _facts(new.rule)
    for what in [*old_facts, *(k for k in new_facts if k not in old_facts)]:
        before, after = old_facts.get(what), new_facts.get(what)
        old_value = before.value if before is not None else None
        new_value = after.value if after is not None else None
        if _same(old_value, new_value):
            continue
        kind = "added" if old_value is None else "removed" if new_value is None else "changed"
        changes.append(
            SemanticChange(
                what,
                kind,
                _render(old_value),
                _render(new_value),
                _locate(old, before.path) if before is not None and old_value is not None else None,
                _locate(new, after.path) if after is not None and new_value is not None else None,
            )
        )
    return changes
