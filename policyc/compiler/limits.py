"""Operating limits solved into the loss matrix: the limited rule is the Bayes rule of an adjusted matrix.

Each limit j has a pattern M_j and a multiplier μ_j ≥ 0, and the compiled rule minimises the
conditional risk under L' = L + Σ_j μ_j M_j (loss rows are actions, reject row last):

* ``max_share: {a: s}``: M_j is 1 on every entry of row a, so R'(a|x) = R(a|x) + μ_j and the share
  of rows that receive a falls as μ_j rises;
* ``min_recall: {c: {actions: S, share: s}}``: M_j is 1 in column c of the rows not in S, so
  R'(b|x) = R(b|x) + μ_j P(c|x) for b ∉ S and the share of class-c rows that receive an action of S
  rises with μ_j.

Rates are monotone in their own multiplier: raising μ_j only makes the actions it concerns
costlier, so a row that left a capped action (or entered a listed set) stays there.

Confidence (Neyman–Pearson umbrella order statistic; Tong, Feng & Li 2018, Science Advances 4(2)).
For one limit, let α be the rate it may not exceed (s for a cap, 1 − s for the misses of a recall
floor) and n the rows it is judged on (all rows, or the rows of the class). The family of rules
traced by μ_j puts each row i on the wrong side while μ_j is below a per-row value t_i; keeping the
x rows of largest t_i on the wrong side (μ_j just above the (x+1)-th largest t_i) leaves new data
on the wrong side with probability above α at most
v = P(Binomial(n, α) ≤ x) = Σ_{i=0}^{x} C(n, i) α^i (1 − α)^(n − i)
(the umbrella algorithm's bound, written for the count of wrong rows). The solver takes the largest
x with v ≤ δ_j, which is the same as asking that the one-sided Clopper–Pearson bound of the wrong
rows at level 1 − δ_j stay within the limit; it needs n ≥ ln δ_j / ln(1 − α) rows. Several limits
split the error probability (Bonferroni): δ_j = (1 − confidence) / m, so all m hold together with
probability at least ``confidence``.

Joint solution (a monotone iteration). Start from μ = 0; sweep the limits in order, and whenever
limit j fails at the current μ, raise μ_j to the smallest value at which it holds with the other
multipliers fixed, g_j(μ_{-j}); stop when a whole sweep raises nothing. Argument:

1. μ never decreases, and the loop stops only when every limit holds at the current μ (a limit
   that holds needs no raise, and one that fails is raised to where it holds), so a returned μ
   is feasible: the solver never returns a rule under which a limit fails on the reference data.
2. When each g_j is non-decreasing in the other multipliers (limits that compete for rows: any
   set of caps, and recall floors whose listed actions include the capped actions), every
   iterate stays below every feasible μ* componentwise: μ⁰ = 0 ≤ μ*, and if μᵗ ≤ μ* then
   μᵗ⁺¹_j = g_j(μᵗ_{-j}) ≤ g_j(μ*_{-j}) ≤ μ*_j. So when the loop stops it returns the
   componentwise least feasible multipliers (the feasible set is closed under componentwise
   minimum, so this least point exists). For other combinations the returned μ is still
   feasible, and each μ_j was raised only while its own limit failed.
3. g_j is a step function (a row leaves an action only past a strict inequality), so the
   iterates can creep towards a point that is not feasible: a few rows switch back and forth
   between two actions, each switch satisfying one limit and breaking the other, while the
   multipliers rise by the tie margin per sweep (a capped inspector bench and a recall floor that
   lists it, with a defect on the bench/pack boundary). The solver detects the creep (the decisions
   after a sweep repeat those after one of the two sweeps before) and jumps along its direction
   d = μᵗ − μᵗ⁻ᵏ to the first point where a row takes an action it did not take during the cycle
   (decisions are piecewise constant along the ray, so that point is the least breakpoint), then
   sweeps again. On the segment skipped only the cycling rows can change, between actions that
   each failed a limit in the cycle, so the skipped points are argued (not proved) infeasible.
4. With no feasible μ* (limits that contradict each other) the multipliers rise without end.
   A jump that finds no breakpoint ahead, or MAX_ROUNDS sweeps, ends with ``limit-infeasible``
   naming the limits still rising.

A single limit settles in one sweep. Unreachable limits (too few rows for the confidence, rows
that no multiplier moves: invalid rows, or P(c|x) = 0 exactly) are reported at once.

Price of a limit (Boyd & Vandenberghe 2004, §5.6, from memory, for the sensitivity reading):
expected loss per reference row under the stated L of the rule with that limit alone minus the
unlimited rule, E = (1/n) Σ_i R(a_i|x_i) with R from the stated L; non-negative because the
unlimited rule minimises R row by row. The price of all limits together is reported too.
"""

from __future__ import annotations

import math
from collections.abc import Sequence
from dataclasses import dataclass
from pathlib import Path
from typing import Any, Literal

import numpy as np
from scipy import stats

from policyc.evidence.base import Progress
from policyc.evidence.io import DataError, read_feature_batches
from policyc.files import file_sha256
from policyc.language.model import OperatingLimits, Policy
from policyc.runtime import Rule, kernel

__all__ = [
    "MAX_ROUNDS",
    "TIE_MARGIN",
    "Limit",
    "LimitInfeasible",
    "LimitOutcome",
    "ReferenceSample",
    "SolvedLimits",
    "allowed_wrong_rows",
    "limits_from_policy",
    "read_reference",
    "solve_limits",
]

MAX_ROUNDS = 200
"""Sweeps of the monotone iteration (jumps included) before limits that keep rising are reported as contradictory."""
TIE_MARGIN = 1e-9
"""A multiplier sits this far (times the loss scale) past the row it must move, so rounding in the runtime's
risk products cannot put that row back on a tie."""


class LimitInfeasible(Exception):
    """Limits that no multipliers satisfy on the reference data; ``limits`` names them."""

    def __init__(self, limits: Sequence[Limit], message: str) -> None:
        super().__init__(message)
        self.limits = tuple(limits)
        self.message = message


@dataclass(frozen=True)
class Limit:
    """One limit in matrix terms: the actions that count, the pattern M_j its multiplier adds, the rate bound."""

    kind: Literal["max_share", "min_recall"]
    subject: str
    share: float
    counted: np.ndarray  # (A,) bool: the capped action, or the listed actions
    pattern: np.ndarray  # (A, K) M_j
    class_index: int | None = None

    @property
    def name(self) -> str:
        return f"{self.kind}[{self.subject}]"

    @property
    def path(self) -> tuple[str, ...]:
        return ("limits", self.kind, self.subject)

    @property
    def allowed_rate(self) -> float:
        """α: the share of judged rows that may fall on the wrong side."""
        return self.share if self.kind == "max_share" else 1.0 - self.share


def limits_from_policy(policy: Policy, actions: Sequence[str]) -> tuple[Limit, ...]:
    """The policy's limits (checked), over ``actions`` (the reject action last when there is one)."""
    assert policy.limits is not None
    n_actions, n_classes = len(actions), len(policy.classes)
    limits = []
    for action, share in policy.limits.max_share.items():
        counted = np.array([a == action for a in actions])
        pattern = np.zeros((n_actions, n_classes))
        pattern[counted, :] = 1.0  # a cap adds μ to every entry of its action's row
        limits.append(Limit("max_share", action, share, counted, pattern))
    for name, recall in policy.limits.min_recall.items():
        counted = np.array([a in recall.actions for a in actions])
        column = policy.classes.index(name)
        pattern = np.zeros((n_actions, n_classes))
        pattern[~counted, column] = 1.0  # a floor adds μ to its class's entries in the rows not listed
        limits.append(Limit("min_recall", name, recall.share, counted, pattern, column))
    return tuple(limits)


@dataclass(frozen=True)
class ReferenceSample:
    """Posteriors of the reference rows under the unlimited rule (posteriors do not depend on the loss)."""

    data: str
    sha256: str
    posteriors: np.ndarray  # (n, K); NaN on invalid rows
    valid: np.ndarray  # (n,) bool
    novel: np.ndarray  # (n,) bool: deferred as novelty whatever the multipliers
    codes: np.ndarray | None  # (n,) class index of each row's label, when a label column is given

    @property
    def rows(self) -> int:
        return int(self.valid.size)


def read_reference(
    rule: Rule, limits: OperatingLimits, base_dir: Path | None, progress: Progress | None = None
) -> ReferenceSample:
    """Read the reference data in batches and keep each row's posteriors (memory: n × K floats).

    Raises DataError for a missing file or column, a label that is not a class, a pinned file whose
    content differs, or invalid rows under ``invalid_input: error``.
    """
    path = Path(limits.data)
    path = path if path.is_absolute() or base_dir is None else base_dir / path
    if not path.is_file():
        raise DataError(f"{path}: no such file")
    # XXX: hashed before reading; a file replaced between the two is not detected.
    digest = file_sha256(path)
    if limits.sha256 is not None and digest != limits.sha256:
        raise DataError(f"{path}: sha256 {digest}, not the pinned value")
    posteriors, valid, novel, codes = [], [], [], []
    for batch in read_feature_batches(path, rule.features, label=limits.label, classes=rule.classes):
        assessment = rule.assess(batch.features)
        if rule.invalid_input == "error" and not assessment.valid.all():
            raise DataError(f"{path}: reference {kernel.invalid_rows_message(assessment.valid, batch.first_row)}")
        if limits.label is not None:
            batch_codes = batch.class_codes(rule.classes)
            unknown = batch.first_unknown_label(batch_codes)
            if unknown is not None:
                raise DataError(f"{path}: column {limits.label!r}, row {unknown[0]}: {unknown[1]!r} is not a class")
            codes.append(batch_codes)
        posteriors.append(assessment.posteriors)
        valid.append(assessment.valid)
        novel.append(assessment.reason == "novelty")
        if progress is not None:
            progress(batch.features.shape[0], None, "reference data")
    if not posteriors:
        raise DataError(f"{path}: the file has no rows")
    return ReferenceSample(
        str(limits.data),
        digest,
        np.concatenate(posteriors),
        np.concatenate(valid),
        np.concatenate(novel),
        np.concatenate(codes) if codes else None,
    )


# --- one limit -------------------------------------------------------------------------------------


def _risks(sample: ReferenceSample, loss: np.ndarray) -> np.ndarray:
    """R(a|x) = Σ_k λ(a|k) P(k|x), constant rows exactly their constant (as the runtime kernel computes them)."""
    posteriors = np.where(sample.valid[:, None], sample.posteriors, 0.0)
    risks = posteriors @ loss.T
    constant = (loss == loss[:, :1]).all(axis=1)
    risks[:, constant] = loss[constant, 0]
    return risks


def _decisions(sample: ReferenceSample, loss: np.ndarray) -> np.ndarray:
    """The runtime's choice per row: argmin of the risks, ties to the earlier action, invalid and novel rows to
    the last."""
    return kernel.choose(_risks(sample, loss), sample.valid, loss.shape[0] - 1, sample.novel)


def _judged(limit: Limit, sample: ReferenceSample) -> np.ndarray:
    """Rows a limit is judged on: every row for a cap, the rows labelled with the class for a recall floor."""
    if limit.kind == "max_share":
        return np.ones(sample.rows, dtype=bool)
    assert sample.codes is not None and limit.class_index is not None
    return sample.codes == limit.class_index


def _wrong(limit: Limit, decisions: np.ndarray) -> np.ndarray:
    """Rows on the wrong side: receiving the capped action, or (recall) receiving none of the listed ones."""
    counted = limit.counted[decisions]
    return counted if limit.kind == "max_share" else ~counted


def allowed_wrong_rows(rows: int, rate: float, delta: float) -> int:
    """Largest x with P(Binomial(rows, rate) ≤ x) ≤ δ, or -1 when even x = 0 is too many.

    Keeping at most x judged rows on the wrong side keeps the new-data rate within ``rate`` with
    probability at least 1 − δ (Tong, Feng & Li 2018, umbrella algorithm; see the module docstring).
    """
    cdf = stats.binom.cdf(np.arange(rows + 1), rows, rate)  # P(Bin(n, α) ≤ x), x = 0..n
    return int(np.searchsorted(cdf, delta, side="right")) - 1


def _row_thresholds(limit: Limit, sample: ReferenceSample, loss: np.ndarray, margin: float) -> np.ndarray:
    """Per judged row, the multiplier at or above which it is on the right side (±inf: never moves)."""
    risks = _risks(sample, loss)
    decided = kernel.choose(risks, sample.valid, loss.shape[0] - 1, sample.novel)
    counted = limit.counted
    if limit.kind == "max_share":
        others = np.where(counted[None, :], np.inf, risks).min(axis=1)
        own = risks[:, counted][:, 0]
        # R(a|x) + μ > min_{b≠a} R(b|x)  ⟺  μ > min_{b≠a} R(b|x) − R(a|x)
        need = others - own + margin
    else:
        listed = np.where(counted[None, :], risks, np.inf).min(axis=1)
        unlisted = np.where(counted[None, :], np.inf, risks).min(axis=1)
        p_class = np.where(sample.valid, sample.posteriors[:, limit.class_index], 0.0)
        moved = p_class > 0.0
        with np.errstate(divide="ignore", invalid="ignore"):
            # min_S R ≤ min_{b∉S} R(b|x) + μ P(c|x)  ⟺  μ ≥ (min_S R − min_{b∉S} R) / P(c|x)
            need = np.where(moved, (listed - unlisted + margin) / np.where(moved, p_class, 1.0), 0.0)
        # P(c|x) = 0: the multiplier does not touch the row; it stays where it is
        need = np.where(moved, need, np.where(counted[decided], -np.inf, np.inf))
    # invalid and novel rows always go to the reject action, whatever the multipliers
    fixed = np.where(_wrong(limit, decided), np.inf, -np.inf)
    need = np.where(sample.valid & ~sample.novel, need, fixed)
    return need[_judged(limit, sample)]


def _margin(loss: np.ndarray) -> float:
    return TIE_MARGIN * max(1.0, float(np.abs(loss).max()))


@dataclass(frozen=True)
class _Judging:
    """What a limit is held to: the rows judged and how many may be on the wrong side."""

    rows: int
    allowed: int


def _judging(limit: Limit, sample: ReferenceSample, delta: float) -> _Judging:
    rows = int(_judged(limit, sample).sum())
    what = "reference rows" if limit.kind == "max_share" else f"reference rows labelled {limit.subject!r}"
    if rows == 0:
        raise LimitInfeasible([limit], f"{limit.name}: there are no {what}")
    allowed = allowed_wrong_rows(rows, limit.allowed_rate, delta)
    if allowed < 0:
        # (1 − α)^n ≤ δ  ⟺  n ≥ ln δ / ln(1 − α)
        needed = math.ceil(math.log(delta) / math.log1p(-limit.allowed_rate)) if limit.allowed_rate > 0 else None
        enough = f"at least {needed}" if needed is not None else "more"
        raise LimitInfeasible(
            [limit],
            f"{limit.name}: {rows} {what} cannot show share {limit.share:g} at this confidence; it needs {enough}",
        )
    return _Judging(rows, allowed)


def _holds(limit: Limit, judging: _Judging, sample: ReferenceSample, decisions: np.ndarray) -> bool:
    return int(_wrong(limit, decisions)[_judged(limit, sample)].sum()) <= judging.allowed


def _least_multiplier(limit: Limit, judging: _Judging, sample: ReferenceSample, base: np.ndarray) -> float:
    """g_j: the smallest μ_j ≥ 0 with at most ``judging.allowed`` judged rows on the wrong side under
    ``base + μ_j M_j`` (``base`` holds the other multipliers)."""
    if _holds(limit, judging, sample, _decisions(sample, base)):
        return 0.0
    need = np.sort(_row_thresholds(limit, sample, base, _margin(base)))[::-1]
    # the rows with the `allowed` largest thresholds may stay wrong; the next one must move
    threshold = float(need[judging.allowed])
    if not np.isfinite(threshold):
        raise LimitInfeasible(
            [limit],
            f"{limit.name}: more than {judging.allowed} judged reference rows stay on the wrong side whatever the "
            "multiplier (invalid input sent to the reject action, or a posterior of exactly 0)",
        )
    return max(threshold, 0.0)


# --- all limits together ---------------------------------------------------------------------------


def _adjusted(loss: np.ndarray, limits: Sequence[Limit], multipliers: np.ndarray) -> np.ndarray:
    # L' = L + Σ_j μ_j M_j
    return loss + np.einsum("j,jak->ak", multipliers, np.stack([limit.pattern for limit in limits]))


def _solve(loss: np.ndarray, limits: Sequence[Limit], sample: ReferenceSample, delta: float) -> tuple[np.ndarray, int]:
    """The monotone iteration of the module docstring, with its jumps: (multipliers, sweeps)."""
    judging = [_judging(limit, sample, delta) for limit in limits]
    multipliers = np.zeros(len(limits))
    history: list[tuple[np.ndarray, np.ndarray, np.ndarray]] = []  # (decisions, multipliers, visited) per sweep
    rising: list[Limit] = []
    for sweep in range(1, MAX_ROUNDS + 1):
        rising = []
        visited = np.zeros((sample.rows, loss.shape[0]), dtype=bool)  # (row, action) taken during the sweep
        for j, limit in enumerate(limits):
            decisions = _decisions(sample, _adjusted(loss, limits, multipliers))
            visited[np.arange(sample.rows), decisions] = True
            if _holds(limit, judging[j], sample, decisions):
                continue
            others = multipliers.copy()
            others[j] = 0.0
            least = _least_multiplier(limit, judging[j], sample, _adjusted(loss, limits, others))
            multipliers[j] = max(multipliers[j], least)
            rising.append(limit)
        if not rising:
            return multipliers, sweep
        decisions = _decisions(sample, _adjusted(loss, limits, multipliers))
        visited[np.arange(sample.rows), decisions] = True
        for back, (earlier, earlier_multipliers, _) in enumerate(reversed(history[-2:])):
            if np.array_equal(decisions, earlier):  # creeping: the same rows cycle while the multipliers rise
                cycle = visited | np.logical_or.reduce([v for _, _, v in history[len(history) - back - 1 :]])
                multipliers = _jump(loss, limits, sample, earlier_multipliers, multipliers, cycle)
                break
        history.append((decisions, multipliers.copy(), visited))
    names = ", ".join(limit.name for limit in rising)
    raise LimitInfeasible(
        rising,
        f"{names}: the limits pull against each other; their multipliers still rise after {MAX_ROUNDS} sweeps",
    )


def _jump(
    loss: np.ndarray,
    limits: Sequence[Limit],
    sample: ReferenceSample,
    before: np.ndarray,
    after: np.ndarray,
    cycling: np.ndarray,
) -> np.ndarray:
    """Leave a creeping cycle: follow the ray μ(s) = after + s (after − before) to the first s at which a row
    changes to an action it did not take during the cycle (``cycling``: (row, action) pairs taken), and step past it.

    Along the ray R'(a|x) grows linearly, R'(a|x; s) = R'(a|x; 0) + s Σ_k D[a, k] P(k|x) with
    D = Σ_j (after − before)_j M_j, so row i leaves its action c for b at s = (R'(b) − R'(c)) / (slope_c − slope_b).
    """
    direction = after - before
    adjusted = _adjusted(loss, limits, after)
    risks = _risks(sample, adjusted)
    chosen = kernel.choose(risks, sample.valid, loss.shape[0] - 1, sample.novel)
    rows = np.arange(sample.rows)
    posteriors = np.where(sample.valid[:, None], sample.posteriors, 0.0)
    slopes = posteriors @ _adjusted(np.zeros_like(loss), limits, direction).T
    closing = slopes[rows, chosen][:, None] - slopes  # how fast action b gains on the chosen one
    gap = risks - risks[rows, chosen][:, None]
    with np.errstate(divide="ignore", invalid="ignore"):
        crossing = np.where(closing > 0.0, gap / closing, np.inf)
    crossing[cycling | ~(sample.valid & ~sample.novel)[:, None]] = np.inf  # invalid and novel rows never move
    row, action = np.unravel_index(int(np.argmin(crossing)), crossing.shape)
    if not np.isfinite(crossing[row, action]):
        moving = [limit for limit, step in zip(limits, direction, strict=True) if step > 0.0]
        names = ", ".join(limit.name for limit in moving)
        raise LimitInfeasible(
            moving, f"{names}: the limits pull against each other; raising their multipliers further changes nothing"
        )
    step = crossing[row, action] + _margin(adjusted) / closing[row, action]
    return after + step * direction


@dataclass(frozen=True)
class LimitOutcome:
    """One limit's figures on the reference data under the limited rule."""

    limit: Limit
    multiplier: float
    rows: int  # judged rows
    count: int  # rows receiving the capped action / class rows caught by a listed action
    bound: float  # one-sided Clopper–Pearson bound at 1 − δ_j: upper for a cap, lower for a recall floor
    alone_multiplier: float
    price: float

    @property
    def rate(self) -> float:
        return self.count / self.rows


@dataclass(frozen=True)
class SolvedLimits:
    """The adjusted matrix L' and what the manifest and reports say about it."""

    stated_loss: np.ndarray  # (A, K), reject row last
    adjusted_loss: np.ndarray
    outcomes: tuple[LimitOutcome, ...]
    confidence: float
    sweeps: int
    expected_loss_unlimited: float
    expected_loss_limited: float
    sample: ReferenceSample
    label: str | None

    @property
    def per_limit_confidence(self) -> float:
        return 1.0 - (1.0 - self.confidence) / max(1, len(self.outcomes))  # Bonferroni: δ_j = (1 − confidence) / m

    @property
    def price(self) -> float:
        return self.expected_loss_limited - self.expected_loss_unlimited

    def manifest_entry(self, actions: Sequence[str], classes: Sequence[str]) -> dict[str, Any]:
        def table(matrix: np.ndarray) -> dict[str, dict[str, float]]:
            return {a: dict(zip(classes, row, strict=True)) for a, row in zip(actions, matrix.tolist(), strict=True)}

        return {
            "data": self.sample.data,
            "data_sha256": self.sample.sha256,
            "label": self.label,
            "rows": self.sample.rows,
            "invalid_rows": int((~self.sample.valid).sum()),
            "confidence": self.confidence,
            "per_limit_confidence": self.per_limit_confidence,
            "sweeps": self.sweeps,
            "stated_loss": table(self.stated_loss),
            "adjusted_loss": table(self.adjusted_loss),
            "expected_loss_unlimited": self.expected_loss_unlimited,
            "expected_loss_limited": self.expected_loss_limited,
            "price": self.price,
            "limits": [
                {
                    "kind": o.limit.kind,
                    "subject": o.limit.subject,
                    "actions": [a for a, c in zip(actions, o.limit.counted.tolist(), strict=True) if c],
                    "share": o.limit.share,
                    "multiplier": o.multiplier,
                    "rows": o.rows,
                    "count": o.count,
                    "rate": o.rate,
                    "bound": o.bound,
                    "alone_multiplier": o.alone_multiplier,
                    "price": o.price,
                }
                for o in self.outcomes
            ],
        }


def _expected_loss(sample: ReferenceSample, stated: np.ndarray, decisions: np.ndarray) -> float:
    """E = (1/n) Σ_i R(a_i|x_i), R from the stated matrix; invalid rows cost the reject row's first entry."""
    risks = _risks(sample, stated)
    chosen = risks[np.arange(sample.rows), decisions]
    return float(np.where(sample.valid, chosen, stated[-1, 0]).mean())


def _one_sided_bound(limit: Limit, rows: int, count: int, delta: float) -> float:
    """Clopper–Pearson at level 1 − δ: upper bound on a share, lower bound on a recall."""
    wrong = count if limit.kind == "max_share" else rows - count
    # upper bound u on the wrong rate: P(Bin(n, u) ≤ x) = δ, i.e. u = Beta⁻¹(1 − δ; x + 1, n − x)
    upper = 1.0 if wrong >= rows else float(stats.beta.ppf(1.0 - delta, wrong + 1, rows - wrong))
    return upper if limit.kind == "max_share" else 1.0 - upper


def solve_limits(
    stated: np.ndarray, limits: Sequence[Limit], sample: ReferenceSample, confidence: float, label: str | None
) -> SolvedLimits:
    """Solve every limit into L' at ``confidence`` (Bonferroni across limits); raise LimitInfeasible.

    Parameters
    ----------
    stated : array of shape (n_actions, n_classes)
        The stated loss matrix, reject row (d, ..., d) last when there is a reject option.
    limits : the limits, from :func:`limits_from_policy`.
    sample : the reference rows' posteriors (and labels for recall floors).
    confidence : probability that every limit holds on new data from the same source.
    """
    unlimited = _expected_loss(sample, stated, _decisions(sample, stated))
    if not limits:
        return SolvedLimits(stated, stated.copy(), (), confidence, 0, unlimited, unlimited, sample, label)
    delta = (1.0 - confidence) / len(limits)  # Bonferroni: Σ_j δ_j = 1 − confidence
    multipliers, sweeps = _solve(stated, limits, sample, delta)
    adjusted = _adjusted(stated, limits, multipliers)
    decisions = _decisions(sample, adjusted)
    outcomes = []
    for j, limit in enumerate(limits):
        judged = _judged(limit, sample)
        rows = int(judged.sum())
        count = int(limit.counted[decisions][judged].sum())
        bound = _one_sided_bound(limit, rows, count, delta)
        if (bound > limit.share + 1e-9) if limit.kind == "max_share" else (bound < limit.share - 1e-9):
            raise LimitInfeasible([limit], f"{limit.name}: the solved rule misses the limit by rounding ({bound:.6g})")
        alone, _ = _solve(stated, [limit], sample, delta)
        alone_loss = _expected_loss(sample, stated, _decisions(sample, _adjusted(stated, [limit], alone)))
        outcomes.append(
            LimitOutcome(limit, float(multipliers[j]), rows, count, bound, float(alone[0]), alone_loss - unlimited)
        )
    limited = _expected_loss(sample, stated, decisions)
    return SolvedLimits(stated, adjusted, tuple(outcomes), confidence, sweeps, unlimited, limited, sample, label)
