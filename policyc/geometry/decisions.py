"""Decisions at points of the probability simplex, and loss matrices compared across rules."""

from __future__ import annotations

from collections.abc import Sequence

import numpy as np

__all__ = ["align_columns", "decide_on_posteriors", "margin_tolerance", "matching_actions"]


def margin_tolerance(loss: np.ndarray) -> float:
    """Risk differences below this count as ties: 1e-9 relative to the largest loss (and at least 1e-9)."""
    return 1e-9 * max(1.0, float(np.max(np.abs(loss))))


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


def align_columns(loss: np.ndarray, classes: Sequence[str], reference: Sequence[str]) -> np.ndarray:
    """``loss`` (columns in ``classes`` order) with its columns put in the ``reference`` class order.

    Raises ValueError when the two class lists are not the same set.
    """
    if set(classes) != set(reference) or len(classes) != len(reference):
        raise ValueError(f"the class lists differ ({list(reference)} vs {list(classes)})")
    order = [list(classes).index(name) for name in reference]
    return np.asarray(loss)[:, order]


def matching_actions(
    old_actions: Sequence[str], old_reject: str | None, new_actions: Sequence[str], new_reject: str | None
) -> np.ndarray:
    """Boolean (A_old, A_new): actions match by name, and the two reject options match whatever their names."""
    return np.array(
        [[a == b or (a == old_reject and b == new_reject) for b in new_actions] for a in old_actions], dtype=bool
    ).reshape(len(old_actions), len(new_actions))
