"""Policy + fitted evidence -> Rule: named arrays and a manifest, nothing else."""

from __future__ import annotations

from dataclasses import dataclass, replace
from pathlib import Path
from typing import Any

import numpy as np
from scipy import stats

from policyc import __version__
from policyc.compiler.limits import (
    LimitInfeasible,
    SolvedLimits,
    limits_from_policy,
    read_reference,
    solve_limits,
)
from policyc.compiler.manifest import LimitsRecord, NoveltyRecord, RuleManifest
from policyc.errors import DataError, FitProblem
from policyc.evidence import FittedEvidence, PartitionRunner, Progress, fit_evidence
from policyc.evidence.calibration import brier_score, expected_calibration_error, log_loss
from policyc.language.checks import load_checked_policy
from policyc.language.diagnostics import CompileError, Diagnostic, Severity
from policyc.language.model import Policy
from policyc.language.source import SourceDocument
from policyc.runtime import FORMAT_NAME, FORMAT_VERSION, Rule, kernel
from policyc.runtime.artefact import decode_rule, encode_rule

__all__ = ["CompiledPolicy", "compile_policy", "rule_from_parts"]


@dataclass(frozen=True)
class CompiledPolicy:
    """The compiled rule with what produced it, for reports."""

    rule: Rule
    policy: Policy
    document: SourceDocument
    diagnostics: tuple[Diagnostic, ...]


def compile_policy(
    path: str | Path, progress: Progress | None = None, partitions: PartitionRunner | None = None
) -> CompiledPolicy:
    """Check, fit and compile a policy file. Raises a PolicyError subclass on any error.

    ``partitions`` runs the fit's per-file statistics (default: this process; ``policyc.cluster`` for Dask).
    """
    document, policy, diagnostics = load_checked_policy(path)
    try:
        fitted = fit_evidence(policy, document.base_dir, progress, partitions)
    except FitProblem as problem:
        diagnostic = Diagnostic(problem.code, Severity.ERROR, problem.message, problem.path, hint=problem.hint)
        raise CompileError([document.locate(diagnostic)]) from None
    except DataError as error:
        raise CompileError(
            [
                document.locate(
                    Diagnostic("training-data-unusable", Severity.ERROR, str(error), ("evidence", "training", "data"))
                )
            ]
        ) from None
    _require_pinned_data_unchanged(document, policy, fitted)
    rule = rule_from_parts(policy, fitted, document.sha256)
    if policy.limits is not None:
        rule = rule_from_parts(policy, fitted, document.sha256, _solved_limits(document, policy, rule, progress))
    return CompiledPolicy(rule, policy, document, diagnostics)


def _solved_limits(
    document: SourceDocument, policy: Policy, unlimited: Rule, progress: Progress | None
) -> SolvedLimits:
    """Solve the limits on the reference data's posteriors under the unlimited rule (they do not depend on L)."""
    assert policy.limits is not None
    try:
        sample = read_reference(unlimited, policy.limits, document.base_dir, progress)
        limits = limits_from_policy(policy, unlimited.actions)
        return solve_limits(_stated_loss(policy), limits, sample, policy.limits.confidence, policy.limits.label)
    except DataError as error:
        where: tuple[str | int, ...] = ("limits", "data")
        raise CompileError(
            [document.locate(Diagnostic("reference-data-unusable", Severity.ERROR, str(error), where))]
        ) from None
    except LimitInfeasible as infeasible:
        hint = "relax a limit, lower confidence:, or add reference rows"
        raise CompileError(
            [
                document.locate(Diagnostic("limit-infeasible", Severity.ERROR, infeasible.message, limit.path, hint))
                for limit in infeasible.limits
            ]
        ) from None


def _require_pinned_data_unchanged(document: SourceDocument, policy: Policy, fitted: FittedEvidence) -> None:
    """The check compared the pin with the file before fitting; the fit hashed what it actually read."""
    pinned = getattr(policy.evidence, "training", None)
    if pinned is None or pinned.sha256 is None or fitted.training_sha256 == pinned.sha256:
        return
    message = f"training data changed while compiling: sha256 {fitted.training_sha256}, not the pinned value"
    where = ("evidence", "training", "sha256")
    raise CompileError([document.locate(Diagnostic("training-data-hash-mismatch", Severity.ERROR, message, where))])


def _deployment_priors(policy: Policy, fitted: FittedEvidence) -> np.ndarray:
    if policy.priors == "training":
        assert fitted.training_counts is not None
        counts = np.array([fitted.training_counts[name] for name in policy.classes], dtype=float)
        return counts / counts.sum()
    stated = np.array([policy.priors[name] for name in policy.classes])
    return stated / stated.sum()  # the check allowed |Σ - 1| <= 1e-6; make it exact


def _stated_loss(policy: Policy) -> np.ndarray:
    """The loss matrix with the reject option as one more row of constant cost d, last."""
    loss = policy.loss_matrix()
    reject_cost = policy.reject_cost()
    if reject_cost is not None:
        # the reject option as one more action of constant risk d: R(reject|x) = Σ_k d P(k|x) = d
        # (the kernel sets constant rows' risk to d exactly)
        loss = np.vstack([loss, np.full(len(policy.classes), reject_cost)])
    return loss


def rule_from_parts(
    policy: Policy, fitted: FittedEvidence, policy_sha256: str, limits: SolvedLimits | None = None
) -> Rule:
    """Assemble the Rule: log priors, the loss matrix with the reject row last (L' when limits were solved),
    evidence arrays, manifest."""
    priors = _deployment_priors(policy, fitted)
    actions = [*policy.actions, *([policy.reject.action] if policy.reject is not None else [])]
    loss = limits.adjusted_loss if limits is not None else _stated_loss(policy)
    with np.errstate(divide="ignore"):
        log_priors = np.log(priors)
    fitted = _with_calibration_scores(fitted)
    params = {"log_priors": log_priors, "loss": loss, **fitted.params}
    record = LimitsRecord(**limits.manifest_entry(actions, policy.classes)) if limits is not None else None
    novelty = _novelty(policy, len(fitted.features))
    if novelty is not None:
        params["novelty_threshold"] = np.array(novelty.threshold)
    manifest = _manifest(policy, fitted, priors, actions, policy_sha256, record, novelty)
    # Round-trip through the artefact encoding: the in-memory rule is exactly the one a file holds.
    encoded_manifest, encoded_params = decode_rule(encode_rule(manifest, params), origin=policy.policy)
    return Rule(encoded_manifest, encoded_params, origin=policy.policy)


def _novelty(policy: Policy, n_features: int) -> NoveltyRecord | None:
    """The novelty threshold χ²_d⁻¹(coverage): D² of a row drawn from N(μ_k, Σ_k) is χ²_d distributed, so it
    exceeds the threshold with probability 1 − coverage (Mardia, Kent & Bibby 1979, §2.5; references.md NOV-2)."""
    if policy.reject is None or policy.reject.novelty is None:
        return None
    coverage = policy.reject.novelty.coverage
    threshold = float(stats.chi2.ppf(coverage, n_features))
    return NoveltyRecord(coverage=coverage, degrees_of_freedom=n_features, threshold=threshold)


def _with_calibration_scores(fitted: FittedEvidence) -> FittedEvidence:
    """Add log-loss, Brier score and ECE on the calibration data, before and after the fitted map, to the
    evidence description. The map is applied by the runtime kernel itself, so the scores are the rule's."""
    sample = fitted.calibration_sample
    if sample is None:
        return fitted
    before = sample.probabilities / sample.probabilities.sum(axis=1, keepdims=True)
    with np.errstate(divide="ignore"):
        log_q = kernel.calibrated_log_probabilities(sample.probabilities, fitted.params)
    top = log_q.max(axis=1, keepdims=True)
    mapped = np.isfinite(top[:, 0])
    # q = softmax(ln q): subtract the row max first
    after = np.exp(log_q[mapped] - top[mapped])
    after /= after.sum(axis=1, keepdims=True)
    codes = sample.codes[mapped]
    scores = {
        "before": _scores(before[mapped], codes),
        "after": _scores(after, codes),
        "rows_not_calibrated": int(np.count_nonzero(~mapped)),
    }
    description = {**fitted.description, "calibrate": {**fitted.description["calibrate"], "scores": scores}}
    return replace(fitted, description=description)


def _scores(probabilities: np.ndarray, codes: np.ndarray) -> dict[str, float]:
    return {
        "log_loss": log_loss(probabilities, codes),
        "brier": brier_score(probabilities, codes),
        "ece": expected_calibration_error(probabilities, codes),
    }


def _manifest(
    policy: Policy,
    fitted: FittedEvidence,
    priors: np.ndarray,
    actions: list[str],
    policy_sha256: str,
    limits: LimitsRecord | None,
    novelty: NoveltyRecord | None = None,
) -> dict[str, Any]:
    counts = fitted.training_counts
    manifest = RuleManifest(
        format=FORMAT_NAME,
        format_version=FORMAT_VERSION,
        policy=policy.policy,
        revision=policy.revision,
        description=policy.description,
        classes=list(policy.classes),
        actions=actions,
        reject_action=policy.reject.action if policy.reject is not None else None,
        reject_cost=policy.reject_cost(),
        features=list(fitted.features),
        priors=dict(zip(policy.classes, priors.tolist(), strict=True)),
        priors_source="training" if policy.priors == "training" else "policy",
        training_class_counts=counts,
        training_priors=(
            {name: counts[name] / sum(counts.values()) for name in policy.classes} if counts is not None else None
        ),
        loss_stated_as=policy.matrix_key,
        loss_unit=policy.loss_unit,
        invalid_input=policy.invalid_input,
        evidence=fitted.description,
        policy_sha256=policy_sha256,
        training_sha256=fitted.training_sha256,
        policyc_version=__version__,
        limits=limits,
        novelty=novelty,
    )
    # a rule without limits keeps the manifest (and content hash) it had before limits existed
    omitted = {
        "arrays",
        "content_sha256",
        *(() if limits is not None else ("limits",)),
        *(() if novelty is not None else ("novelty",)),
    }
    return manifest.model_dump(mode="json", exclude_none=False, exclude=omitted)
