"""Loss matrices on the probability simplex: where each row is the minimum-risk choice.

Used by the consistency checks (unreachable actions, a reject option that never fires)
and by the reports (the reach of the reject option on the risk-reject curve).
"""

from __future__ import annotations

from typing import Any

import numpy as np

from policyc.geometry.decisions import margin_tolerance

__all__ = [
    "WITNESS_POINTS",
    "ReachabilityError",
    "linprog",
    "margin_tolerance",
    "reject_reach_value",
    "winning_margin",
    "wins_somewhere",
]

WITNESS_POINTS = 256
"""Uniform points tried before the linear program in :func:`wins_somewhere`: enough to find most regions."""


class ReachabilityError(ArithmeticError):
    """The linear program over the simplex found no solution (it always has one for finite losses)."""


def linprog(*args: Any, **kwargs: Any) -> Any:
    """``scipy.optimize.linprog``, imported on first use: it is a third of `policyc check`'s start-up."""
    from scipy.optimize import linprog as solve

    return solve(*args, **kwargs)


def winning_margin(loss: np.ndarray, row: int) -> tuple[float, np.ndarray]:
    """Largest margin t by which ``row`` beats every other row at some posterior, and that posterior.

    Linear program over the probability simplex:
    maximise t  s.t.  (λ_row - λ_b)·p + t ≤ 0 for all b ≠ row,  Σ p = 1,  p ≥ 0.
    The row is the minimum-risk choice on a set of positive measure iff t > 0.
    For the reject row (constant d) this t equals V - d, where
    V = max_p min_a λ_a·p is the value of the loss matrix as a zero-sum game.

    Parameters
    ----------
    loss : array of shape (n_rows, n_classes)
        Loss rows; the reject option, if any, is a constant row.
    row : int
        The row to examine.

    Returns
    -------
    margin : float
    posterior : array of shape (n_classes,), where the margin is reached.

    Raises
    ------
    ReachabilityError
        When the solver fails; callers that report on a policy turn it into a diagnostic.
    """
    n_rows, n_classes = loss.shape
    others = [b for b in range(n_rows) if b != row]
    if not others:
        return float("inf"), np.full(n_classes, 1.0 / n_classes)
    # Solve on λ / s with s = max|λ|: the margin scales with the losses (t = s t'), and the solver treats
    # coefficients of 1e20 and more as infinite, so unscaled losses of that size made it fail.
    scale = float(np.max(np.abs(loss))) or 1.0
    scaled = loss / scale
    objective = np.zeros(n_classes + 1)
    objective[-1] = -1.0  # linprog minimises, so minimise -t
    a_ub = np.hstack([scaled[row] - scaled[others], np.ones((len(others), 1))])
    a_eq = np.hstack([np.ones((1, n_classes)), np.zeros((1, 1))])
    bounds = [(0.0, None)] * n_classes + [(None, None)]
    result = linprog(
        objective, A_ub=a_ub, b_ub=np.zeros(len(others)), A_eq=a_eq, b_eq=[1.0], bounds=bounds, method="highs"
    )
    if not result.success:  # the feasible set is a bounded simplex, so only a numerical failure lands here
        raise ReachabilityError(f"the linear program over the probability simplex failed: {result.message}")
    posterior = np.clip(result.x[:n_classes], 0.0, None)
    return float(-result.fun) * scale, posterior / posterior.sum()  # t = s t'


def reject_reach_value(loss: np.ndarray) -> float:
    """V = max_p min_a Σ_j λ(a|j) p_j: deferring at cost d is ever taken iff d < V (Chow 1970 for 0-1 loss)."""
    augmented = np.vstack([loss, np.zeros(loss.shape[1])])
    margin, _ = winning_margin(augmented, augmented.shape[0] - 1)
    return margin  # margin of a zero-cost reject row = V - 0


def wins_somewhere(loss: np.ndarray, row: int, tolerance: float) -> bool:
    """Whether ``row`` beats every other row by more than ``tolerance`` at some posterior.

    A few posteriors are tried first: the vertices, the centre and the edge midpoints of the simplex, and
    ``WITNESS_POINTS`` seeded uniform points. The margin at any posterior is at most the linear program's
    maximum (:func:`winning_margin`), so a margin above the tolerance there settles the question without the
    program (and without importing scipy); otherwise the program decides. The answer is the program's either way.

    Parameters
    ----------
    loss : array of shape (n_rows, n_classes)
    row : int
    tolerance : float
        Margins at or below this are ties.

    Returns
    -------
    bool
    """
    n_rows, n_classes = loss.shape
    if n_rows == 1:
        return True
    vertices = np.eye(n_classes)
    first, second = np.triu_indices(n_classes, k=1)
    uniform = np.random.default_rng(0).dirichlet(np.ones(n_classes), WITNESS_POINTS)
    centre = np.full(n_classes, 1.0 / n_classes)
    candidates = np.vstack([vertices, centre, (vertices[first] + vertices[second]) / 2, uniform])
    risks = candidates @ loss.T  # R(a|p) = Σ_k λ(a|k) p_k at every candidate p
    others = np.delete(risks, row, axis=1)
    if np.any(others.min(axis=1) - risks[:, row] > tolerance):
        return True
    return winning_margin(loss, row)[0] > tolerance
