"""The loss matrix a rule was stated with: what review tools charge decisions by.

A rule compiled with operating limits decides by the adjusted matrix L' = L + Σ_j μ_j M_j (its ``loss``
array), but its cost is still the stated L, which the manifest keeps under ``limits.stated_loss``.
"""

from __future__ import annotations

import numpy as np

from policyc.runtime import Rule

__all__ = ["stated_loss", "stated_risks"]


def stated_loss(rule: Rule) -> np.ndarray:
    """(A, K) stated loss in ``rule.actions`` x ``rule.classes`` order, reject row last; the rule's own
    matrix when it has no limits."""
    limits = rule.manifest.get("limits")
    if limits is None:
        return np.asarray(rule.params["loss"])
    table = limits["stated_loss"]
    return np.array([[table[a][c] for c in rule.classes] for a in rule.actions], dtype=np.float64)


def stated_risks(rule: Rule, posteriors: np.ndarray) -> np.ndarray:
    """(n, A) conditional risks by the stated matrix, R(a|x) = Σ_k L[a, k] P(k|x); constant rows (the reject
    option) exactly their constant, as the runtime computes them."""
    loss = stated_loss(rule)
    risks = posteriors @ loss.T
    constant = (loss == loss[:, :1]).all(axis=1)
    risks[:, constant] = loss[constant, 0]
    return risks
