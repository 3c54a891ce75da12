"""What changes between two policies or rules: settings, decisions on the simplex, decisions on data, gates.

Each side is a policy file (checked and compiled in memory, so its evidence is
fitted and its source positions are known) or a compiled rule file. The report
has four parts:

``semantic``
    Settings that differ, ``what: old -> new``: classes, actions and features
    added, removed or reordered; priors; loss entries (always on the loss
    scale, a stated gain negated; as stated, before any operating limits); the reject action and cost; invalid_input;
    loss_unit; evidence settings (kind, covariance, shrinkage, columns, trained
    priors, calibration, the sha256 of the training data actually fitted) and,
    for gaussian evidence, a digest of the fitted class means and
    covariances; operating limits: each limit's share, listed actions,
    multiplier, reference rate and price, and the price of all together (so
    a diff between revisions says when a price moves). Between two policy files every entry carries
    ``file:line:col`` in both files (the value's position; for an entry
    present on one side only, the other side has none). Between rules, or a
    rule and a policy, the manifests and arrays are compared and entries of a
    rule side have no location.

``posterior_space`` (no data needed)
    Where on the probability simplex the chosen action changes. The decision at
    a posterior vector p is argmin over loss rows of λ·p (reject row last, ties
    to the earlier row), so this compares the loss matrices and reject costs
    only; changed priors or evidence move inputs within the simplex, which only
    the data diff sees. Needs the same classes on both sides (their order may
    differ). Two classes: exact intervals on P(second class | x) and the
    sub-intervals whose action changes. Three or more: the share of the simplex
    (uniform measure) per (old action -> new action), estimated from
    scrambled Sobol points mapped to the simplex; the standard error comes from
    independent scrambles (replicates): SE = sd(replicate shares) / √R.

``data`` (with ``--data``)
    Both rules decide every row (in batches). Flip matrix (old action x new
    action counts) and flip rate; each rule's reject share; the expected risk of
    each rule's decisions under the NEW rule's model and stated loss matrix,
    mean R_new(a_old(x)|x) and mean R_new(a_new(x)|x), over rows valid for the
    new rule (without operating limits the new decisions minimise it by
    construction, so new - old <= 0; with limits, new - old is what they cost
    on these rows); with ``--label`` the
    empirical risk of each rule's decisions by the NEW policy's loss matrix and
    the difference new - old with a paired percentile bootstrap interval.

``gates``
    Limits checked in CI; a failed gate makes the command exit 1.

Actions are matched by name, except that the two reject options match each
other whatever their names (deferring is deferring).

JSON shape (``policyc diff --format json``; keys sorted, floats rounded to 10
significant digits, NaN/inf as null)::

    {
      "old": {"source", "kind": "policy"|"rule", "policy", "revision",
              "content_sha256", "policy_sha256", "training_sha256"},
      "new": {... same ...},
      "semantic": [{"what", "change": "changed"|"added"|"removed"|"reordered",
                    "old", "new", "old_location", "new_location"}],
      "posterior_space": {
        "comparable": bool, "reason": str|null, "classes": [str],
        "method": "exact"|"sobol", "changed_share": float|null,
        "standard_error": float|null, "note": str,
        "posterior_of": str|null,                       # two classes
        "old_intervals": [{"low", "high", "action"}],   # two classes, else []
        "new_intervals": [{"low", "high", "action"}],
        "movements": [{"old_action", "new_action", "share", "standard_error",
                       "low", "high"}],                 # low/high: two classes only
        "samples": int|null, "replicates": int|null, "seed": int|null
      },
      "data": null | {
        "source", "rows", "invalid_rows", "features_differ": bool, "notes": [str],
        "flips": {"old_actions": [str], "new_actions": [str], "counts": [[int]]},
        "flip_rate", "reject_rate": {"old", "new"},
        "deferred_by_reason": {"old", "new"} (each {"min-risk": n, "invalid": n}, null without a reject option),
        "expected_risk": null | {"basis", "rows", "old_decisions", "new_decisions", "difference"},
        "empirical_risk": null | {"label", "basis", "rows", "old", "new",
                                  "difference": {"estimate", "low", "high", "confidence",
                                                 "resamples", "seed", "method"}}
      },
      "gates": [{"name", "limit", "value", "passed", "basis", "message"}],
      "passed": bool
    }
"""

from __future__ import annotations

from pathlib import Path
from typing import Annotated

from pydantic import Field, computed_field
from pydantic.dataclasses import dataclass

from policyc.evidence.io import DEFAULT_BATCH_ROWS
from policyc.geometry.sampling import DEFAULT_SIMPLEX_SAMPLES
from policyc.review.diff.data import DataDiff, data_diff
from policyc.review.diff.gates import Gate, GateLimits, evaluate_gates
from policyc.review.diff.posterior import PosteriorSpaceDiff, posterior_space_diff
from policyc.review.diff.semantic import SemanticChange, semantic_changes
from policyc.review.shared.bootstrap import DEFAULT_CONFIDENCE, DEFAULT_RESAMPLES, DEFAULT_SEED
from policyc.review.shared.loading import LoadedRule, RuleIdentity, identity
from policyc.review.shared.reports import REPORT_CONFIG

__all__ = [
    "DataDiff",
    "DiffReport",
    "Gate",
    "GateLimits",
    "PosteriorSpaceDiff",
    "SemanticChange",
    "data_diff",
    "diff",
    "evaluate_gates",
    "posterior_space_diff",
    "semantic_changes",
]


@dataclass(frozen=True, config=REPORT_CONFIG)
class DiffReport:
    """What ``policyc diff`` reports; its JSON is this object (schemas/diff-report.schema.json)."""

    old: Annotated[LoadedRule, Field(exclude=True)]
    new: Annotated[LoadedRule, Field(exclude=True)]
    semantic: tuple[SemanticChange, ...]
    posterior_space: PosteriorSpaceDiff
    data: DataDiff | None
    gates: tuple[Gate, ...]

    @computed_field  # type: ignore[prop-decorator]
    @property
    def passed(self) -> bool:
        return all(gate.passed for gate in self.gates)

    @property
    def loss_unit(self) -> str | None:
        return self.new.rule.manifest.get("loss_unit")

    @computed_field(alias="old")  # type: ignore[prop-decorator]
    @property
    def old_identity(self) -> RuleIdentity:
        return identity(self.old)

    @computed_field(alias="new")  # type: ignore[prop-decorator]
    @property
    def new_identity(self) -> RuleIdentity:
        return identity(self.new)


def diff(
    old: LoadedRule,
    new: LoadedRule,
    data: Path | None = None,
    label: str | None = None,
    limits: GateLimits | None = None,
    samples: int = DEFAULT_SIMPLEX_SAMPLES,
    confidence: float = DEFAULT_CONFIDENCE,
    resamples: int = DEFAULT_RESAMPLES,
    seed: int = DEFAULT_SEED,
    batch_rows: int = DEFAULT_BATCH_ROWS,
) -> DiffReport:
    """The whole report: chains the semantic, posterior-space and data diffs and the gates."""
    limits = limits or GateLimits()
    space = posterior_space_diff(old.rule, new.rule, samples, seed)
    on_data = None
    if data is not None:
        on_data = data_diff(old.rule, new.rule, data, label, confidence, resamples, seed, batch_rows)
    semantic = tuple(semantic_changes(old, new))
    return DiffReport(old, new, semantic, space, on_data, evaluate_gates(limits, space, on_data))
