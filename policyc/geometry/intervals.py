"""Two-class rules as intervals of the posterior: where on P(second class | x) each action is chosen."""

from __future__ import annotations

import itertools
from dataclasses import dataclass

import numpy as np

__all__ = ["PosteriorInterval", "posterior_intervals"]


@dataclass(frozen=True)
class PosteriorInterval:
    """The action (index into the rule's actions) chosen for P(second class | x) in [low, high]."""

    low: float
    high: float
    action: int


def posterior_intervals(loss: np.ndarray) -> list[PosteriorInterval]:
    """Exact decision intervals on q = P(class 2 | x) for a two-class loss matrix (reject row included).

    Each action's risk is linear in q: R(a|q) = λ(a|1)(1 - q) + λ(a|2) q. The chosen action changes
    only where two lines cross, q* = (λ(b|1) - λ(a|1)) / ((λ(a|2) - λ(a|1)) - (λ(b|2) - λ(b|1)));
    for a zero-diagonal 2×2 matrix this is Elkan's p* = c10 / (c10 + c01) (Elkan 2001, §1.3).
    At a crossing the earlier action wins the tie.
    """
    if loss.shape[1] != 2:
        raise ValueError("posterior intervals are defined for two classes")
    start, slope = loss[:, 0], loss[:, 1] - loss[:, 0]
    points = {0.0, 1.0}
    for a in range(loss.shape[0]):
        for b in range(a + 1, loss.shape[0]):
            if slope[a] != slope[b]:
                crossing = (start[b] - start[a]) / (slope[a] - slope[b])
                if 0.0 < crossing < 1.0:
                    points.add(float(crossing))
    edges = sorted(points)
    intervals: list[PosteriorInterval] = []
    for low, high in itertools.pairwise(edges):
        middle = 0.5 * (low + high)
        action = int(np.argmin(start + slope * middle))
        if intervals and intervals[-1].action == action:
            intervals[-1] = PosteriorInterval(intervals[-1].low, high, action)
        else:
            intervals.append(PosteriorInterval(low, high, action))
    return intervals
