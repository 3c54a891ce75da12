"""An independent brute-force reference, written longhand with scipy, against the runtime and the module.

For each class: ln p(x|k) from scipy.stats.multivariate_normal.logpdf; posteriors by an
explicit max-shifted exponent and sum; conditional risks by an explicit double loop;
the decision by an explicit argmin, rejecting whenever the minimum risk exceeds d.
"""

from __future__ import annotations

import itertools
from pathlib import Path

import numpy as np
import pytest
import scipy.stats
from helpers import gaussian_rule, random_spd, standalone

TIE_GUARD = 1e-9


def brute_force(
    X: np.ndarray,
    means: np.ndarray,
    covariances: np.ndarray,
    priors: np.ndarray,
    loss: np.ndarray,
    reject_cost: float | None,
) -> tuple[np.ndarray, np.ndarray, np.ndarray, np.ndarray]:
    """Posteriors, risks, decisions and the risk gap to the nearest competing choice, row by row."""
    n_rows, n_classes, n_actions = X.shape[0], means.shape[0], loss.shape[0]
    # scipy.stats.multivariate_normal.logpdf (references.md MV-1) plus ln P(k)
    log_joint = np.empty((n_rows, n_classes))
    for k in range(n_classes):
        log_joint[:, k] = scipy.stats.multivariate_normal(means[k], covariances[k]).logpdf(X) + np.log(priors[k])
    posteriors = np.empty((n_rows, n_classes))
    risks = np.empty((n_rows, n_actions))
    decisions = np.empty(n_rows, dtype=int)
    gaps = np.empty(n_rows)
    for n in range(n_rows):
        top = max(log_joint[n])
        weights = [np.exp(value - top) for value in log_joint[n]]
        total = sum(weights)
        posteriors[n] = [w / total for w in weights]
        # R(a|x) = Σ_j λ(a|j) P(j|x) (Fukunaga 1990 eq. 3.19, references.md LR-1)
        for a in range(n_actions):
            risks[n, a] = sum(loss[a, j] * posteriors[n, j] for j in range(n_classes))
        best = min(range(n_actions), key=lambda a: risks[n, a])
        choices = sorted(risks[n])
        gap = choices[1] - choices[0] if n_actions > 1 else np.inf
        decisions[n] = best
        if reject_cost is not None:
            # Chow 1970 (references.md CH-1) in general form: reject when min_a R(a|x) > d
            gap = min(gap, abs(risks[n, best] - reject_cost))
            if risks[n, best] > reject_cost:
                decisions[n] = n_actions
        gaps[n] = gap
    return posteriors, risks, decisions, gaps


CASES = [
    pytest.param(n_classes, d, with_reject, id=f"K{n_classes}-d{d}-{'reject' if with_reject else 'plain'}")
    for n_classes, d, with_reject in itertools.product([2, 3, 4], [1, 2, 4], [False, True])
] + [pytest.param(3, 3, True, id="K3-d3-reject"), pytest.param(4, 3, False, id="K4-d3-plain")]


@pytest.mark.parametrize(("n_classes", "d", "with_reject"), CASES)
def test_runtime_and_module_agree_with_brute_force(n_classes: int, d: int, with_reject: bool, tmp_path: Path) -> None:
    rng = np.random.default_rng(1000 * n_classes + 10 * d + with_reject)
    means = rng.normal(0.0, 1.5, (n_classes, d))
    covariances = np.array([random_spd(rng, d) for _ in range(n_classes)])
    priors = rng.dirichlet(np.full(n_classes, 2.0))
    n_actions = int(rng.integers(2, 5))
    loss = rng.uniform(0.0, 10.0, (n_actions, n_classes))
    X = np.concatenate([rng.normal(0.0, 2.5, (400, d)), means[rng.integers(0, n_classes, 200)]])
    reject_cost = None
    if with_reject:
        # a reject cost inside the spread of minimum risks, so that both rejecting and accepting occur
        # (halfway between two distinct minimum risks: saturated posteriors repeat the same risk exactly)
        _, risks, _, _ = brute_force(X, means, covariances, priors, loss, None)
        distinct = np.unique(risks.min(axis=1))
        middle = int(0.7 * distinct.size)
        reject_cost = float(0.5 * (distinct[middle] + distinct[middle + 1]))
    posteriors, risks, expected, gaps = brute_force(X, means, covariances, priors, loss, reject_cost)
    rule = gaussian_rule(means, covariances, priors, loss, reject_cost=reject_cost)
    clear = gaps > TIE_GUARD
    assert clear.mean() > 0.99
    assert np.array_equal(rule.decide(X)[clear], expected[clear])
    assert np.allclose(rule.posteriors(X), posteriors, rtol=1e-9, atol=1e-12)
    extended = loss if reject_cost is None else np.vstack([loss, np.full(n_classes, reject_cost)])
    assert np.allclose(rule.risks(X)[:, : loss.shape[0]], risks, rtol=1e-9, atol=1e-11)
    assert rule.params["loss"].tolist() == extended.tolist()
    if with_reject:
        assert 0.1 < (expected == n_actions).mean() < 0.5

    # the standalone module is bit-identical to the runtime, invalid rows included
    module = standalone(rule, tmp_path)
    X_invalid = X[:10].copy()
    X_invalid[3, 0] = np.nan
    X_invalid[6, -1] = -np.inf
    for inputs in (X, X_invalid) if with_reject else (X,):
        assert np.array_equal(module.decide(inputs), rule.decide(inputs))
        assert np.array_equal(module.posteriors(inputs), rule.posteriors(inputs), equal_nan=True)
        assert np.array_equal(module.risks(inputs), rule.risks(inputs), equal_nan=True)
