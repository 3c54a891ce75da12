"""Estimate the class mix of unlabelled data with a compiled rule (EM for new priors).

Saerens, Latinne & Decaestecker (2002), "Adjusting the outputs of a classifier to new
a priori probabilities: a simple procedure", Neural Computation 14(1):21-41.
With p_k(x) the rule's posteriors under its priors π, new priors π̃ give
p̃_k(x) ∝ (π̃_k / π_k) p_k(x). EM alternates that correction (E-step) with
π̃_k = mean over rows of p̃_k(x) (M-step); the fixed point maximises
ℓ(π̃) = Σ_rows ln Σ_k (π̃_k / π_k) p_k(x) over the simplex.
"""

from __future__ import annotations

from pathlib import Path
from typing import Annotated

import numpy as np
from pydantic import Field, computed_field
from pydantic.dataclasses import dataclass
from scipy import stats

from policyc.evidence.base import Progress
from policyc.evidence.io import DataError, count_rows, data_file_list, read_feature_batches
from policyc.render import dumps
from policyc.review.shared.reports import REPORT_CONFIG
from policyc.runtime import Rule

__all__ = [
    "PASTE_DECIMALS",
    "PriorEstimate",
    "estimate_priors",
    "estimate_priors_from_posteriors",
    "posteriors_of_file",
    "priors_block",
    "render_priors",
    "rounded_priors",
    "verdict",
]

PASTE_DECIMALS = 4
"""Decimals of the pasteable ``priors:`` block; the rounding remainder goes to the largest class so it sums to 1."""


@dataclass(frozen=True, config=REPORT_CONFIG)
class PriorEstimate:
    """What ``policyc priors`` reports; its JSON is this object (schemas/priors-report.schema.json)."""

    classes: Annotated[tuple[str, ...], Field(exclude=True)]
    rule_priors: Annotated[np.ndarray, Field(exclude=True)]
    priors: Annotated[np.ndarray, Field(exclude=True)]
    low: Annotated[np.ndarray, Field(exclude=True)]
    high: Annotated[np.ndarray, Field(exclude=True)]
    iterations: int
    converged: bool
    change_statistic: float
    p_value: float
    rows: int
    confidence: float

    @computed_field(alias="priors")  # type: ignore[prop-decorator]
    @property
    def priors_by_class(self) -> dict[str, float]:
        return dict(zip(self.classes, self.priors.tolist(), strict=True))

    @computed_field(alias="rule_priors")  # type: ignore[prop-decorator]
    @property
    def rule_priors_by_class(self) -> dict[str, float]:
        return dict(zip(self.classes, self.rule_priors.tolist(), strict=True))

    @computed_field  # type: ignore[prop-decorator]
    @property
    def interval(self) -> dict[str, tuple[float, float]]:
        return {c: (lo, hi) for c, lo, hi in zip(self.classes, self.low.tolist(), self.high.tolist(), strict=True)}

    @computed_field  # type: ignore[prop-decorator]
    @property
    def rejects_no_change(self) -> bool:
        """Whether the change test rejects "no change" at level 1 - confidence."""
        return self.p_value < 1.0 - self.confidence


def _log_likelihood(ratios: np.ndarray, weights: np.ndarray) -> float:
    # ℓ(π̃) = Σ_rows ln Σ_k (π̃_k / π_k) p_k(x)
    return float(np.sum(np.log(ratios @ weights)))


def estimate_priors_from_posteriors(
    posteriors: np.ndarray,
    rule_priors: np.ndarray,
    classes: tuple[str, ...],
    tolerance: float = 1e-10,
    max_iterations: int = 10_000,
    confidence: float = 0.95,
) -> PriorEstimate:
    """EM for new priors from posteriors (n, K) computed under ``rule_priors``.

    Classes with a rule prior of 0 have posterior 0 everywhere and keep an estimate of 0.
    Convergence: the largest change of any prior between iterations is below ``tolerance``.
    The interval is a Wald interval from the observed information of ℓ on the simplex; the
    change statistic is 2[ℓ(π̂) - ℓ(π)], compared with χ² on (K' - 1) degrees of freedom
    (K' classes with non-zero prior; Saerens et al. 2002 describe such a likelihood-ratio test).
    """
    active = rule_priors > 0
    ratios = posteriors[:, active] / rule_priors[active]  # a_k(x) = p_k(x) / π_k
    estimate = rule_priors[active].copy()
    iterations, converged = 0, False
    while iterations < max_iterations and not converged:
        corrected = ratios * estimate  # E-step: p̃_k(x) ∝ (π̃_k / π_k) p_k(x)
        corrected /= corrected.sum(axis=1, keepdims=True)
        updated = corrected.mean(axis=0)  # M-step: π̃_k = (1/N) Σ_rows p̃_k(x)
        converged = float(np.max(np.abs(updated - estimate))) < tolerance
        estimate, iterations = updated, iterations + 1
    statistic = max(0.0, 2.0 * (_log_likelihood(ratios, estimate) - _log_likelihood(ratios, rule_priors[active])))
    degrees = int(active.sum()) - 1
    p_value = float(stats.chi2.sf(statistic, degrees)) if degrees > 0 else 1.0
    low, high = _wald_interval(ratios, estimate, confidence)
    full = np.zeros_like(rule_priors)
    full_low, full_high = np.zeros_like(rule_priors), np.zeros_like(rule_priors)
    full[active], full_low[active], full_high[active] = estimate, low, high
    return PriorEstimate(
        classes,
        rule_priors,
        full,
        full_low,
        full_high,
        iterations,
        converged,
        statistic,
        p_value,
        posteriors.shape[0],
        confidence,
    )


def _wald_interval(ratios: np.ndarray, estimate: np.ndarray, confidence: float) -> tuple[np.ndarray, np.ndarray]:
    """π̂ ± z·se with se from the inverse observed information in the K-1 free coordinates.

    With π̃_K = 1 - Σ_{j<K} π̃_j and s(x) = Σ_k π̃_k a_k(x):
    ∂²ℓ/∂π̃_i∂π̃_j = -Σ_rows (a_i - a_K)(a_j - a_K) / s², i, j < K.
    """
    n_active = estimate.size
    if n_active < 2:
        return estimate.copy(), estimate.copy()
    mixture = ratios @ estimate
    contrasts = (ratios[:, :-1] - ratios[:, -1:]) / mixture[:, None]
    information = contrasts.T @ contrasts
    free_covariance = np.linalg.pinv(information)
    # the last prior is minus the sum of the free ones, so its variance is 1ᵀ C 1
    embed = np.vstack([np.eye(n_active - 1), -np.ones((1, n_active - 1))])
    variances = np.clip(np.diag(embed @ free_covariance @ embed.T), 0.0, None)
    z = float(stats.norm.ppf(0.5 + confidence / 2.0))
    half_width = z * np.sqrt(variances)
    return np.clip(estimate - half_width, 0.0, 1.0), np.clip(estimate + half_width, 0.0, 1.0)


def posteriors_of_file(rule: Rule, data: Path, progress: Progress | None = None) -> np.ndarray:
    """The rule's posteriors for every valid row of ``data`` (a file, or a directory or glob of files, in
    :func:`~policyc.evidence.io.data_file_list`'s order), read in batches. Memory: 8·K bytes per row."""
    parts = []
    files = data_file_list(data)
    counts = [count_rows(path) for path in files] if progress is not None else [None]
    total = None if None in counts else sum(c for c in counts if c is not None)
    for path in files:
        for batch in read_feature_batches(path, rule.features):
            assessment = rule.assess(batch.features)
            parts.append(assessment.posteriors[assessment.valid])
            if progress is not None:
                progress(batch.features.shape[0], total)
    if not parts or sum(p.shape[0] for p in parts) == 0:
        raise DataError(f"{data}: no valid rows to estimate priors from")
    return np.vstack(parts)


def estimate_priors(
    rule: Rule, data: Path, confidence: float = 0.95, progress: Progress | None = None
) -> PriorEstimate:
    rule_priors = np.array([rule.manifest["priors"][c] for c in rule.classes])
    return estimate_priors_from_posteriors(
        posteriors_of_file(rule, data, progress), rule_priors, rule.classes, confidence=confidence
    )


def rounded_priors(estimate: PriorEstimate) -> dict[str, float]:
    """The estimate at ``PASTE_DECIMALS`` decimals, summing to 1 (the remainder added to the largest class)."""
    rounded = np.round(estimate.priors, PASTE_DECIMALS)
    largest = int(np.argmax(rounded))
    rounded[largest] = round(1.0 - (rounded.sum() - rounded[largest]), PASTE_DECIMALS)
    return {name: float(value) for name, value in zip(estimate.classes, rounded, strict=True)}


def priors_block(estimate: PriorEstimate) -> str:
    """The ``priors:`` mapping to paste into a policy (YAML, keys quoted where YAML would misread them)."""
    import yaml

    text: str = yaml.safe_dump({"priors": rounded_priors(estimate)}, sort_keys=False, default_flow_style=False)
    return text


def verdict(estimate: PriorEstimate) -> str:
    """In words: does the change test reject "no change" at level 1 - confidence?"""
    level = f"{1.0 - estimate.confidence:.3g}"
    if estimate.rejects_no_change:
        return (
            f'The change test rejects "no change" at the {level} level (p = {estimate.p_value:.3g}): the class '
            "mix of the data differs from the rule's priors; review them and recompile."
        )
    return (
        f'The change test does not reject "no change" at the {level} level (p = {estimate.p_value:.3g}): the '
        "data gives no evidence that the class mix differs from the rule's priors."
    )


def render_priors(estimate: PriorEstimate, output_format: str) -> str:
    """text (table, verdict and the block to paste), yaml (the block alone, for tools) or json."""
    if output_format == "yaml":
        return priors_block(estimate)
    if output_format == "json":
        return dumps(estimate)
    interval = f"{estimate.confidence:.0%} interval"
    lines = [f"{'class':<20} {'rule prior':>10} {'estimate':>10}   {interval}"]
    for k, name in enumerate(estimate.classes):
        lines.append(
            f"{name:<20} {estimate.rule_priors[k]:>10.4f} {estimate.priors[k]:>10.4f}   "
            f"[{estimate.low[k]:.4f}, {estimate.high[k]:.4f}]"
        )
    state = "converged" if estimate.converged else "did NOT converge (the estimate is the last iterate)"
    lines.append(f"{estimate.rows} rows; EM {state} in {estimate.iterations} iterations")
    degrees = int(np.count_nonzero(estimate.rule_priors)) - 1
    lines.append(
        f"change statistic 2[l(new) - l(rule)] = {estimate.change_statistic:.4g}, "
        f"p-value {estimate.p_value:.3g} (chi-squared, {degrees} degrees of freedom)"
    )
    lines.append(verdict(estimate))
    lines.append(f"\nto use the estimate, paste into the policy (rounded to {PASTE_DECIMALS} decimals, sums to 1):")
    lines.append(priors_block(estimate).rstrip("\n"))
    return "\n".join(lines)
