"""What changes between two policies or rules: settings, decisions on the simplex, decisions on data, gates.

Each side is a policy file (checked and compiled in memory, so its evidence is
fitted and its source positions are known) or a compiled rule file. The report
has four parts:

``semantic``
    Settings that differ, ``what: old -> new``: classes, actions and features
    added, removed or reordered; priors; loss entries (always on the loss
    scale, a stated gain negated); the reject action and cost; invalid_input;
    loss_unit; evidence settings (kind, covariance, shrinkage, columns, trained
    priors, calibration, the sha256 of the training data actually fitted) and,
    for gaussian evidence, a digest of the fitted class means and
    covariances. Between two policy files every entry carries
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
    each rule's decisions under the NEW rule's model, mean R_new(a_old(x)|x) and
    mean R_new(a_new(x)|x), over rows valid for the new rule (the new decisions
    minimise it by construction, so new - old <= 0); with ``--labels`` the
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

import itertools
import math
from collections.abc import Iterator, Sequence
from dataclasses import dataclass
from pathlib import Path
from typing import Any

import numpy as np
from scipy.stats import qmc

from policyc.batch import assess_batch
from policyc.bootstrap import (
    DEFAULT_CONFIDENCE,
    DEFAULT_RESAMPLES,
    DEFAULT_SEED,
    BootstrapInterval,
    categorical_mean_interval,
)
from policyc.evaluate import label_codes
from policyc.io import DEFAULT_BATCH_ROWS, DataError, read_feature_batches
from policyc.loading import LoadedRule, identity
from policyc.moments import moments_digest
from policyc.runtime import Rule
from policyc.thresholds import posterior_intervals

__all__ = [
    "DEFAULT_SIMPLEX_SAMPLES",
    "SIMPLEX_REPLICATES",
    "ActionInterval",
    "DataDiff",
    "DiffReport",
    "Gate",
    "GateLimits",
    "Movement",
    "PosteriorSpaceDiff",
    "SemanticChange",
    "data_diff",
    "decide_on_posteriors",
    "diff",
    "evaluate_gates",
    "posterior_space_diff",
    "semantic_changes",
    "simplex_points",
]

DEFAULT_SIMPLEX_SAMPLES = 1 << 14
SIMPLEX_REPLICATES = 16
"""Independent scrambles of the Sobol sequence; their spread gives the standard error."""


# --- semantic diff ----------------------------------------------------------------------------


@dataclass(frozen=True)
class SemanticChange:
    """One setting that differs, rendered ``what: old -> new``; locations are ``file:line:col`` or None."""

    what: str
    change: str
    old: str | None
    new: str | None
    old_location: str | None = None
    new_location: str | None = None

    def to_json(self) -> dict[str, Any]:
        return {
            "what": self.what,
            "change": self.change,
            "old": self.old,
            "new": self.new,
            "old_location": self.old_location,
            "new_location": self.new_location,
        }


@dataclass(frozen=True)
class _Fact:
    value: Any
    path: tuple[str | int, ...]  # where it sits in a policy file (loss entries as ("loss", action, class))


def _plain_actions(rule: Rule) -> tuple[str, ...]:
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
    loss = np.asarray(rule.params["loss"])
    for row, action in enumerate(_plain_actions(rule)):
        for column, name in enumerate(rule.classes):
            facts[f"loss[{action}][{name}]"] = _Fact(float(loss[row, column]), ("loss", action, name))
    facts["loss stated as"] = _Fact(manifest.get("loss_stated_as"), ("loss",))
    facts["reject.action"] = _Fact(rule.reject_action, ("reject", "action"))
    facts["reject.cost"] = _Fact(manifest.get("reject_cost"), ("reject", "cost"))
    facts["invalid_input"] = _Fact(rule.invalid_input, ("invalid_input",))
    facts["loss_unit"] = _Fact(manifest.get("loss_unit"), ("loss_unit",))
    facts |= _evidence_facts(dict(manifest["evidence"]), "evidence", ("evidence",))
    facts["evidence.training.sha256"] = _Fact(manifest.get("training_sha256"), ("evidence", "training", "sha256"))
    if rule.evidence == "gaussian":  # other kinds' arrays follow from the settings listed above
        facts["evidence fit (class means and covariances, digest)"] = _Fact(moments_digest(rule), ("evidence",))
    return facts


def _policy_path(loaded: LoadedRule, path: tuple[str | int, ...]) -> tuple[str | int, ...]:
    """A rule-side path as it is spelled in this policy file (a gain policy states gain: and reject gain:)."""
    policy = loaded.policy
    if policy is None or not path:
        return path
    if path[0] == "loss":
        return (policy.matrix_key, *path[1:])
    if path == ("reject", "cost") and policy.reject is not None and policy.reject.cost is None:
        return ("reject", "gain")
    if path == ("features",):
        return ("evidence", "features") if policy.evidence.kind == "gaussian" else ("evidence", "columns")
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
    changes += _name_list_changes(old, new, "actions", _plain_actions(old.rule), _plain_actions(new.rule))
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


# --- posterior space ---------------------------------------------------------------------------


def _same_action(old: Rule, new: Rule, old_name: str, new_name: str) -> bool:
    """Actions match by name; the two reject options match each other whatever their names."""
    return old_name == new_name or (old_name == old.reject_action and new_name == new.reject_action)


def decide_on_posteriors(loss: np.ndarray, posteriors: np.ndarray) -> np.ndarray:
    """Index of the minimum-risk row per posterior vector; ties go to the earlier row (reject row last).

    Parameters
    ----------
    loss : array of shape (A, K)
        Loss rows, the reject row (constant d) last if any.
    posteriors : array of shape (n, K)
        Points of the probability simplex.

    Returns
    -------
    array of int, shape (n,)
    """
    # R(a|p) = Σ_k λ(a|k) p_k; np.argmin returns the first minimum, so ties go to the earlier row
    return np.argmin(posteriors @ loss.T, axis=1)


def simplex_points(n_classes: int, n_points: int, seed: int) -> np.ndarray:
    """Scrambled Sobol points mapped to the uniform distribution on the probability simplex.

    Parameters
    ----------
    n_classes : int
        K, the dimension of the posterior vectors.
    n_points : int
        A power of two (Sobol balance properties hold for powers of two).
    seed : int or numpy SeedSequence entropy
        Seed of the scramble.

    Returns
    -------
    array of shape (n_points, K), rows summing to 1

    Notes
    -----
    With U uniform on [0, 1)^K, E_k = -ln(1 - U_k) are independent Exp(1) and p = E / Σ_j E_j is
    uniform on the simplex, i.e. Dirichlet(1, ..., 1) (Devroye 1986, *Non-Uniform Random Variate
    Generation*, ch. V, exponential spacings). The map is smooth, so the low discrepancy of the
    scrambled Sobol points carries over better than with sorting.
    """
    sobol = qmc.Sobol(d=n_classes, scramble=True, rng=np.random.default_rng(seed))
    u = sobol.random_base2(int(math.log2(n_points)))
    exponential = np.maximum(-np.log1p(-u), np.finfo(float).tiny)  # E_k = -ln(1 - U_k) ~ Exp(1)
    return exponential / exponential.sum(axis=1, keepdims=True)  # p = E / Σ E ~ Dirichlet(1, ..., 1)


@dataclass(frozen=True)
class ActionInterval:
    """Action chosen for P(second class | x) in [low, high]."""

    low: float
    high: float
    action: str

    def to_json(self) -> dict[str, Any]:
        return {"low": self.low, "high": self.high, "action": self.action}


@dataclass(frozen=True)
class Movement:
    """Where the chosen action goes from ``old_action`` to ``new_action``: its share of the simplex
    (standard error 0 when exact) and, for two classes, the interval [low, high] of P(second class | x)."""

    old_action: str
    new_action: str
    share: float
    standard_error: float
    low: float | None = None
    high: float | None = None

    def to_json(self) -> dict[str, Any]:
        return {
            "old_action": self.old_action,
            "new_action": self.new_action,
            "share": self.share,
            "standard_error": self.standard_error,
            "low": self.low,
            "high": self.high,
        }


POSTERIOR_SPACE_NOTE = (
    "compares the decision maps p -> argmin_a loss[a]·p of the two loss matrices (reject row included); "
    "changes of priors or evidence move inputs within the simplex and show only in the data diff"
)


@dataclass(frozen=True)
class PosteriorSpaceDiff:
    comparable: bool
    reason: str | None
    classes: tuple[str, ...]
    method: str | None = None
    changed_share: float | None = None
    standard_error: float | None = None
    movements: tuple[Movement, ...] = ()
    old_intervals: tuple[ActionInterval, ...] = ()
    new_intervals: tuple[ActionInterval, ...] = ()
    samples: int | None = None
    replicates: int | None = None
    seed: int | None = None

    @property
    def posterior_of(self) -> str | None:
        return self.classes[1] if self.comparable and len(self.classes) == 2 else None

    def to_json(self) -> dict[str, Any]:
        return {
            "comparable": self.comparable,
            "reason": self.reason,
            "classes": list(self.classes),
            "method": self.method,
            "changed_share": self.changed_share,
            "standard_error": self.standard_error,
            "note": POSTERIOR_SPACE_NOTE,
            "posterior_of": self.posterior_of,
            "old_intervals": [i.to_json() for i in self.old_intervals],
            "new_intervals": [i.to_json() for i in self.new_intervals],
            "movements": [m.to_json() for m in self.movements],
            "samples": self.samples,
            "replicates": self.replicates,
            "seed": self.seed,
        }


def _aligned_losses(old: Rule, new: Rule) -> tuple[np.ndarray, np.ndarray]:
    """Both loss matrices with columns in the old rule's class order."""
    order = [new.classes.index(name) for name in old.classes]
    return np.asarray(old.params["loss"]), np.asarray(new.params["loss"])[:, order]


def _named_intervals(loss: np.ndarray, actions: Sequence[str]) -> tuple[ActionInterval, ...]:
    return tuple(ActionInterval(i.low, i.high, actions[i.action]) for i in posterior_intervals(loss))


def _action_at(intervals: Sequence[ActionInterval], q: float) -> str:
    return next(i.action for i in intervals if i.low <= q <= i.high)


def _two_class_movements(
    old: Rule, new: Rule, old_intervals: Sequence[ActionInterval], new_intervals: Sequence[ActionInterval]
) -> tuple[Movement, ...]:
    """Sub-intervals of q = P(second class | x) where the chosen action differs, adjacent pieces merged."""
    edges = sorted({e for i in (*old_intervals, *new_intervals) for e in (i.low, i.high)})
    movements: list[Movement] = []
    for low, high in itertools.pairwise(edges):
        middle = 0.5 * (low + high)  # one action per piece: read it at the midpoint
        before, after = _action_at(old_intervals, middle), _action_at(new_intervals, middle)
        if _same_action(old, new, before, after):
            continue
        last = movements[-1] if movements else None
        continues = last is not None and (last.old_action, last.new_action, last.high) == (before, after, low)
        if last is not None and last.low is not None and continues:
            movements[-1] = Movement(before, after, high - last.low, 0.0, last.low, high)  # length = high - low
        else:
            movements.append(Movement(before, after, high - low, 0.0, low, high))  # length = high - low
    return tuple(movements)


def posterior_space_diff(
    old: Rule, new: Rule, samples: int = DEFAULT_SIMPLEX_SAMPLES, seed: int = DEFAULT_SEED
) -> PosteriorSpaceDiff:
    """Where on the probability simplex the chosen action changes (see the module docstring)."""
    if set(old.classes) != set(new.classes) or len(old.classes) != len(new.classes):
        reason = f"the class lists differ ({list(old.classes)} vs {list(new.classes)}), so the simplices differ"
        return PosteriorSpaceDiff(False, reason, tuple(old.classes))
    old_loss, new_loss = _aligned_losses(old, new)
    if len(old.classes) == 2:
        old_intervals = _named_intervals(old_loss, old.actions)
        new_intervals = _named_intervals(new_loss, new.actions)
        movements = _two_class_movements(old, new, old_intervals, new_intervals)
        changed = sum(m.share for m in movements)  # uniform measure on [0, 1]: total length
        return PosteriorSpaceDiff(
            True, None, tuple(old.classes), "exact", changed, 0.0, movements, old_intervals, new_intervals
        )
    return _simplex_diff(old, new, old_loss, new_loss, samples, seed)


def _simplex_diff(
    old: Rule, new: Rule, old_loss: np.ndarray, new_loss: np.ndarray, samples: int, seed: int
) -> PosteriorSpaceDiff:
    """Share of the simplex per (old action -> new action), with a standard error over R scrambles.

    Share estimate = mean of the R replicate shares; SE = sd(replicate shares, ddof 1) / √R
    (randomised quasi-Monte Carlo; Owen 1997, "Monte Carlo variance of scrambled net quadrature").
    """
    per_replicate = samples // SIMPLEX_REPLICATES
    pair_shares = np.zeros((SIMPLEX_REPLICATES, len(old.actions), len(new.actions)))
    children = np.random.SeedSequence(seed).spawn(SIMPLEX_REPLICATES)
    for r, child in enumerate(children):
        points = simplex_points(len(old.classes), per_replicate, child.generate_state(1)[0])
        flat = decide_on_posteriors(old_loss, points) * len(new.actions) + decide_on_posteriors(new_loss, points)
        counts = np.bincount(flat, minlength=len(old.actions) * len(new.actions))
        # share of (old a, new b) in replicate r = points where old chooses a and new chooses b / points
        pair_shares[r] = counts.reshape(len(old.actions), len(new.actions)) / per_replicate
    movements = []
    changed = np.zeros(SIMPLEX_REPLICATES)
    for a, before in enumerate(old.actions):
        for b, after in enumerate(new.actions):
            if _same_action(old, new, before, after) or not pair_shares[:, a, b].any():
                continue
            changed += pair_shares[:, a, b]
            movements.append(Movement(before, after, *_mean_and_se(pair_shares[:, a, b])))
    share, error = _mean_and_se(changed)
    return PosteriorSpaceDiff(
        True,
        None,
        tuple(old.classes),
        "sobol",
        share,
        error,
        tuple(movements),
        samples=per_replicate * SIMPLEX_REPLICATES,
        replicates=SIMPLEX_REPLICATES,
        seed=seed,
    )


def _mean_and_se(replicates: np.ndarray) -> tuple[float, float]:
    # mean of R replicate estimates and its standard error sd / √R
    return float(replicates.mean()), float(replicates.std(ddof=1) / math.sqrt(replicates.size))


# --- data --------------------------------------------------------------------------------------


@dataclass(frozen=True)
class DataDiff:
    """Both rules' decisions on a reference table (see the module docstring for each quantity)."""

    source: str
    old_actions: tuple[str, ...]
    new_actions: tuple[str, ...]
    flips: np.ndarray  # (A_old, A_new) row counts
    flipped: int
    invalid_rows: int  # rows the new rule cannot evaluate (sent per its invalid_input)
    reject_rate_old: float | None
    reject_rate_new: float | None
    expected_risk: tuple[float, float, int] | None  # (old decisions, new decisions, rows) under the new model
    empirical_risk: tuple[float, float, int] | None  # (old, new, rows) by the new loss matrix
    difference: BootstrapInterval | None  # empirical new - old
    label: str | None
    features_differ: bool
    notes: tuple[str, ...] = ()

    @property
    def rows(self) -> int:
        return int(self.flips.sum())

    @property
    def flip_rate(self) -> float:
        # flip rate = rows whose action changes / all rows
        return self.flipped / self.rows if self.rows else float("nan")

    def to_json(self) -> dict[str, Any]:
        expected = None
        if self.expected_risk is not None:
            old, new, rows = self.expected_risk
            expected = {
                "basis": "mean conditional risk R_new(a|x) under the new rule's model, rows valid for the new rule",
                "rows": rows,
                "old_decisions": old,
                "new_decisions": new,
                "difference": new - old,
            }
        empirical = None
        if self.empirical_risk is not None and self.difference is not None:
            old, new, rows = self.empirical_risk
            empirical = {
                "label": self.label,
                "basis": "mean of loss_new[action, true class], the NEW policy's loss matrix",
                "rows": rows,
                "old": old,
                "new": new,
                "difference": self.difference.to_json(),
            }
        return {
            "source": self.source,
            "rows": self.rows,
            "invalid_rows": self.invalid_rows,
            "features_differ": self.features_differ,
            "notes": list(self.notes),
            "flips": {
                "old_actions": list(self.old_actions),
                "new_actions": list(self.new_actions),
                "counts": self.flips.tolist(),
            },
            "flip_rate": self.flip_rate,
            "reject_rate": {"old": self.reject_rate_old, "new": self.reject_rate_new},
            "expected_risk": expected,
            "empirical_risk": empirical,
        }


def _action_map(old: Rule, new: Rule) -> np.ndarray:
    """Index in the new rule of each old action (-1 when the new rule has no such action)."""
    return np.array(
        [
            next((b for b, after in enumerate(new.actions) if _same_action(old, new, before, after)), -1)
            for before in old.actions
        ],
        dtype=np.int64,
    )


@dataclass
class _DataTally:
    """Running sums over batches."""

    old: Rule
    new: Rule
    mapping: np.ndarray
    flips: np.ndarray
    cells: np.ndarray  # (A_new, A_new, K_new): rows per (mapped old action, new action, true class)
    risk_old: float = 0.0
    risk_new: float = 0.0
    risk_rows: int = 0
    invalid: int = 0

    def add(self, X: tuple[np.ndarray, np.ndarray], codes: np.ndarray | None, path: Path, first_row: int) -> None:
        """Decide one batch with both rules; ``X`` holds each rule's feature columns."""
        before = assess_batch(self.old, X[0], path, first_row, "old rule: ")
        after = assess_batch(self.new, X[1], path, first_row, "new rule: ")
        n_new = len(self.new.actions)
        self.flips += np.bincount(
            before.action * n_new + after.action, minlength=len(self.old.actions) * n_new
        ).reshape(len(self.old.actions), n_new)
        self.invalid += int((~after.valid).sum())
        mapped = self.mapping[before.action]
        valid = after.valid
        if (mapped >= 0).all():
            rows = np.flatnonzero(valid)
            # mean R_new(a|x) over rows valid for the new rule, a = the old and the new decision
            self.risk_old += float(after.risks[rows, mapped[rows]].sum())
            self.risk_new += float(after.risks[rows, after.action[rows]].sum())
            self.risk_rows += rows.size
            if codes is not None:
                k = len(self.new.classes)
                flat = (mapped * n_new + after.action) * k + codes
                self.cells += np.bincount(flat, minlength=self.cells.size).reshape(self.cells.shape)


def _batches(
    path: Path, old: Rule, new: Rule, label: str | None, batch_rows: int
) -> Iterator[tuple[tuple[np.ndarray, np.ndarray], np.ndarray | None, int]]:
    columns = list(dict.fromkeys([*old.features, *new.features]))
    old_index = [columns.index(f) for f in old.features]
    new_index = [columns.index(f) for f in new.features]
    for batch in read_feature_batches(path, columns, label=label, batch_rows=batch_rows):
        codes = None
        if batch.label_column is not None:
            codes = label_codes(path, label or "", batch, new.classes, "the new rule")
        yield (batch.features[:, old_index], batch.features[:, new_index]), codes, batch.first_row


def data_diff(
    old: Rule,
    new: Rule,
    data: Path,
    label: str | None = None,
    confidence: float = DEFAULT_CONFIDENCE,
    resamples: int = DEFAULT_RESAMPLES,
    seed: int = DEFAULT_SEED,
    batch_rows: int = DEFAULT_BATCH_ROWS,
) -> DataDiff:
    """Decide every row of ``data`` with both rules, in batches; raise DataError on unusable data."""
    mapping = _action_map(old, new)
    n_new = len(new.actions)
    tally = _DataTally(
        old,
        new,
        mapping,
        np.zeros((len(old.actions), n_new), dtype=np.int64),
        np.zeros((n_new, n_new, len(new.classes)), dtype=np.int64),
    )
    for X, codes, first_row in _batches(data, old, new, label, batch_rows):
        tally.add(X, codes, data, first_row)
    return _finish(tally, data, label, confidence, resamples, seed)


def _finish(tally: _DataTally, data: Path, label: str | None, confidence: float, resamples: int, seed: int) -> DataDiff:
    old, new, mapping, flips = tally.old, tally.new, tally.mapping, tally.flips
    rows = int(flips.sum())
    if rows == 0:
        raise DataError(f"{data}: the file has no rows")
    notes = []
    features_differ = set(old.features) != set(new.features)
    if features_differ:
        notes.append("the rules read different features; each rule decided on its own columns of the data")
    same = mapping[:, None] == np.arange(len(new.actions))[None, :]
    flipped = int(flips[~same].sum())
    unmatched = [a for a, m in zip(old.actions, mapping, strict=True) if m < 0 and flips[old.actions.index(a)].any()]
    expected = empirical = difference = None
    if unmatched:
        notes.append(f"old action(s) {unmatched} do not exist in the new rule, so no risk comparison is possible")
    elif tally.risk_rows:
        # mean R_new(a|x) = Σ_rows R_new(a(x)|x) / rows, for the old and the new decisions
        expected = (tally.risk_old / tally.risk_rows, tally.risk_new / tally.risk_rows, tally.risk_rows)
    if label is not None and not unmatched:
        loss = np.asarray(new.params["loss"])
        # per row: loss_new[a_new, y] - loss_new[a_old, y], by category (a_old mapped, a_new, y)
        values = loss[None, :, :] - loss[:, None, :]
        difference = categorical_mean_interval(tally.cells, values, confidence, resamples, seed)
        # empirical risk = (1/n) Σ_rows loss_new[a(x), y]: cell counts by (action, class) times the loss
        old_loss = float((tally.cells.sum(axis=1) * loss).sum()) / rows
        new_loss = float((tally.cells.sum(axis=0) * loss).sum()) / rows
        empirical = (old_loss, new_loss, rows)
    return DataDiff(
        str(data),
        tuple(old.actions),
        tuple(new.actions),
        flips,
        flipped,
        tally.invalid,
        _reject_share(old, flips.sum(axis=1)),
        _reject_share(new, flips.sum(axis=0)),
        expected,
        empirical,
        difference,
        label,
        features_differ,
        tuple(notes),
    )


def _reject_share(rule: Rule, counts: np.ndarray) -> float | None:
    if rule.reject_action is None:
        return None
    # reject rate = rows sent to the reject action / all rows
    return float(counts[rule.actions.index(rule.reject_action)] / counts.sum())


# --- gates -------------------------------------------------------------------------------------


@dataclass(frozen=True)
class GateLimits:
    """Limits from the command line; None means the gate is not asked for."""

    max_flip_rate: float | None = None
    max_risk_increase: float | None = None
    max_reject_rate: float | None = None
    max_simplex_change: float | None = None

    @property
    def need_data(self) -> list[str]:
        asked = {
            "max-flip-rate": self.max_flip_rate,
            "max-risk-increase": self.max_risk_increase,
            "max-reject-rate": self.max_reject_rate,
        }
        return [name for name, limit in asked.items() if limit is not None]


@dataclass(frozen=True)
class Gate:
    name: str
    limit: float
    value: float | None
    basis: str

    @property
    def passed(self) -> bool:
        return self.value is not None and self.value <= self.limit

    @property
    def message(self) -> str:
        if self.value is None:
            return f"gate {self.name} failed: {self.basis} cannot be measured (limit {self.limit:.4g})"
        if self.passed:
            return f"gate {self.name} passed: {self.basis} {self.value:.4g} <= limit {self.limit:.4g}"
        return (
            f"gate {self.name} failed: {self.basis} {self.value:.4g} exceeds the limit {self.limit:.4g} "
            f"by {self.value - self.limit:.4g}"  # excess = measured value - limit
        )

    def to_json(self) -> dict[str, Any]:
        return {
            "name": self.name,
            "limit": self.limit,
            "value": self.value,
            "passed": self.passed,
            "basis": self.basis,
            "message": self.message,
        }


def evaluate_gates(limits: GateLimits, space: PosteriorSpaceDiff, data: DataDiff | None) -> tuple[Gate, ...]:
    """Measure each requested gate; a gate that cannot be measured fails."""
    gates = []
    if limits.max_flip_rate is not None:
        value = data.flip_rate if data is not None else None
        gates.append(Gate("max-flip-rate", limits.max_flip_rate, value, "flip rate on the data"))
    if limits.max_risk_increase is not None:
        gates.append(_risk_gate(limits.max_risk_increase, data))
    if limits.max_reject_rate is not None:
        value = data.reject_rate_new if data is not None else None
        basis = "the new rule's reject rate on the data"
        if data is not None and value is None:
            value = 0.0  # no reject option: nothing is ever deferred
        gates.append(Gate("max-reject-rate", limits.max_reject_rate, value, basis))
    if limits.max_simplex_change is not None:
        basis = "share of the simplex where the action changes" + (
            " (exact)" if space.method == "exact" else " (Sobol estimate)"
        )
        gates.append(Gate("max-simplex-change", limits.max_simplex_change, space.changed_share, basis))
    return tuple(gates)


def _risk_gate(limit: float, data: DataDiff | None) -> Gate:
    """Empirical risk increase on labelled data. Without labels there is no gate to offer: under the new
    model the new rule's expected risk never exceeds the old rule's, since it minimises that risk."""
    value = data.difference.estimate if data is not None and data.difference is not None else None
    # mean loss_new[a_new, y] - mean loss_new[a_old, y]
    return Gate("max-risk-increase", limit, value, "empirical risk increase new - old (labels, new loss matrix)")


# --- the report --------------------------------------------------------------------------------


@dataclass(frozen=True)
class DiffReport:
    old: LoadedRule
    new: LoadedRule
    semantic: tuple[SemanticChange, ...]
    posterior_space: PosteriorSpaceDiff
    data: DataDiff | None
    gates: tuple[Gate, ...]

    @property
    def passed(self) -> bool:
        return all(gate.passed for gate in self.gates)

    @property
    def loss_unit(self) -> str | None:
        return self.new.rule.manifest.get("loss_unit")

    def to_json(self) -> dict[str, Any]:
        return {
            "old": identity(self.old),
            "new": identity(self.new),
            "semantic": [c.to_json() for c in self.semantic],
            "posterior_space": self.posterior_space.to_json(),
            "data": self.data.to_json() if self.data is not None else None,
            "gates": [g.to_json() for g in self.gates],
            "passed": self.passed,
        }


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
