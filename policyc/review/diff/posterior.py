"""Where on the probability simplex the chosen action changes between two rules (no data needed)."""

from __future__ import annotations

import itertools
from collections.abc import Sequence

import numpy as np
from pydantic import computed_field
from pydantic.dataclasses import dataclass

from policyc.geometry.decisions import align_columns, matching_actions
from policyc.geometry.intervals import posterior_intervals
from policyc.geometry.sampling import DEFAULT_SIMPLEX_SAMPLES, SIMPLEX_REPLICATES, decision_pair_shares, mean_and_se
from policyc.review.shared.bootstrap import DEFAULT_SEED
from policyc.review.shared.reports import REPORT_CONFIG
from policyc.runtime import Rule

__all__ = [
    "POSTERIOR_SPACE_NOTE",
    "ActionInterval",
    "Movement",
    "PosteriorSpaceDiff",
    "posterior_space_diff",
    "same_actions",
]


def same_actions(old: Rule, new: Rule) -> np.ndarray:
    """Boolean (A_old, A_new): actions match by name; the two reject options match each other whatever their names."""
    return matching_actions(old.actions, old.reject_action, new.actions, new.reject_action)


@dataclass(frozen=True, config=REPORT_CONFIG)
class ActionInterval:
    """Action chosen for P(second class | x) in [low, high]."""

    low: float
    high: float
    action: str


@dataclass(frozen=True, config=REPORT_CONFIG)
class Movement:
    """Where the chosen action goes from ``old_action`` to ``new_action``: its share of the simplex
    (standard error 0 when exact) and, for two classes, the interval [low, high] of P(second class | x)."""

    old_action: str
    new_action: str
    share: float
    standard_error: float
    low: float | None = None
    high: float | None = None


POSTERIOR_SPACE_NOTE = (
    "compares the decision maps p -> argmin_a loss[a]·p of the two loss matrices (reject row included); "
    "changes of priors or evidence move inputs within the simplex and show only in the data diff"
)


@dataclass(frozen=True, config=REPORT_CONFIG)
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
    note: str = POSTERIOR_SPACE_NOTE

    @computed_field  # type: ignore[prop-decorator]
    @property
    def posterior_of(self) -> str | None:
        return self.classes[1] if self.comparable and len(self.classes) == 2 else None


def _named_intervals(loss: np.ndarray, actions: Sequence[str]) -> tuple[ActionInterval, ...]:
    return tuple(ActionInterval(i.low, i.high, actions[i.action]) for i in posterior_intervals(loss))


def _action_on(intervals: Sequence[ActionInterval], low: float, high: float) -> str:
    """The action of the interval that holds the piece [low, high] (pieces are cut at every interval's edge)."""
    return next(i.action for i in intervals if i.low <= low and high <= i.high)


def _two_class_movements(
    old: Rule, new: Rule, old_intervals: Sequence[ActionInterval], new_intervals: Sequence[ActionInterval]
) -> tuple[Movement, ...]:
    """Sub-intervals of q = P(second class | x) where the chosen action differs. Every edge is one where a side's
    action changes (each side's equal neighbours are merged), so two pieces in a row never hold the same pair."""
    same = same_actions(old, new)
    edges = sorted({e for i in (*old_intervals, *new_intervals) for e in (i.low, i.high)})
    movements = []
    for low, high in itertools.pairwise(edges):
        before, after = _action_on(old_intervals, low, high), _action_on(new_intervals, low, high)
        if not same[old.actions.index(before), new.actions.index(after)]:
            movements.append(Movement(before, after, high - low, 0.0, low, high))  # length = high - low
    return tuple(movements)


def posterior_space_diff(
    old: Rule, new: Rule, samples: int = DEFAULT_SIMPLEX_SAMPLES, seed: int = DEFAULT_SEED
) -> PosteriorSpaceDiff:
    """Where on the probability simplex the chosen action changes (see the module docstring)."""
    if set(old.classes) != set(new.classes) or len(old.classes) != len(new.classes):
        reason = f"the class lists differ ({list(old.classes)} vs {list(new.classes)}), so the simplices differ"
        return PosteriorSpaceDiff(False, reason, tuple(old.classes))
    old_loss, new_loss = np.asarray(old.params["loss"]), align_columns(new.params["loss"], new.classes, old.classes)
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
    """Share of the simplex per (old action -> new action), with a standard error over R scrambles
    (see :func:`policyc.geometry.sampling.decision_pair_shares`)."""
    pair_shares = decision_pair_shares(old_loss, new_loss, samples, seed)
    same = same_actions(old, new)
    movements = []
    changed = np.zeros(SIMPLEX_REPLICATES)
    for a, before in enumerate(old.actions):
        for b, after in enumerate(new.actions):
            if same[a, b] or not pair_shares[:, a, b].any():
                continue
            changed += pair_shares[:, a, b]
            movements.append(Movement(before, after, *mean_and_se(pair_shares[:, a, b])))
    share, error = mean_and_se(changed)
    return PosteriorSpaceDiff(
        True,
        None,
        tuple(old.classes),
        "sobol",
        share,
        error,
        tuple(movements),
        samples=(samples // SIMPLEX_REPLICATES) * SIMPLEX_REPLICATES,
        replicates=SIMPLEX_REPLICATES,
        seed=seed,
    )
