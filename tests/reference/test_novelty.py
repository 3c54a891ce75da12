"""Novelty (distance) reject against the χ² law of the squared Mahalanobis distance (references.md NOV-1, NOV-2).

Rules are built from exact Gaussian parameters (``helpers.gaussian_rule``), so "the fitted model" is known and the
sampling checks draw from it. Distances are checked against scipy.spatial.distance.mahalanobis.
"""

from __future__ import annotations

from pathlib import Path

import numpy as np
import pytest
import scipy.stats
from helpers import gaussian_rule, random_spd, standalone
from scipy.spatial.distance import mahalanobis

from policyc.runtime import Rule

ZERO_ONE_REJECT = 0.4  # reject cost under 0-1 loss


def novelty_rule(
    means: np.ndarray, covariances: np.ndarray, coverage: float, priors: list[float] | None = None
) -> Rule:
    n_classes = means.shape[0]
    priors = priors if priors is not None else [1.0 / n_classes] * n_classes
    loss = 1.0 - np.eye(n_classes)
    return gaussian_rule(means, covariances, priors, loss, reject_cost=ZERO_ONE_REJECT, novelty_coverage=coverage)


def three_classes(d: int, spacing: float, seed: int = 0) -> tuple[np.ndarray, np.ndarray]:
    rng = np.random.default_rng(seed)
    means = np.zeros((3, d))
    means[1, 0], means[2, 1 % d] = spacing, -spacing
    covariances = np.array([random_spd(rng, d) for _ in range(3)])
    return means, covariances


@pytest.mark.parametrize(
    ("d", "coverage", "expected"),
    # NOV-2 values (scipy 1.17.1): χ²₄⁻¹(0.999) = 18.466827; χ²₂⁻¹(0.99) = 9.210340; χ²₃₂⁻¹(0.999) = 62.487219
    [(4, 0.999, 18.466827), (2, 0.99, 9.210340), (32, 0.999, 62.487219)],
)
def test_the_threshold_is_the_chi_square_quantile(d: int, coverage: float, expected: float) -> None:
    rule = novelty_rule(*three_classes(d, 3.0), coverage)
    threshold = float(rule.params["novelty_threshold"])
    assert threshold == scipy.stats.chi2.ppf(coverage, d)
    assert threshold == pytest.approx(expected, abs=1e-6)
    assert rule.manifest["novelty"] == {"coverage": coverage, "degrees_of_freedom": d, "threshold": threshold}


@pytest.mark.parametrize(("d", "spacing"), [(2, 3.0), (4, 2.0), (2, 400.0)])
def test_each_class_is_novelty_deferred_at_most_one_minus_coverage_of_the_time(d: int, spacing: float) -> None:
    # NOV-2: for x ~ N(μ_k, Σ_k), P(D²_k > χ²_d⁻¹(q)) = 1 − q, so P(novel) ≤ 1 − q, with equality when the
    # other classes are far away (spacing 400). 1 − q = 0.01 and n = 20 000 rows per class: s.e. = 0.0007
    coverage, n = 0.99, 20_000
    means, covariances = three_classes(d, spacing, seed=d)
    rule = novelty_rule(means, covariances, coverage)
    rng = np.random.default_rng(1)
    tail = 1.0 - coverage
    standard_error = np.sqrt(tail * coverage / n)
    for mean, covariance in zip(means, covariances, strict=True):
        rate = float(np.mean(rule.explain(rng.multivariate_normal(mean, covariance, size=n)).reason == "novelty"))
        assert rate <= tail + 3 * standard_error
        if spacing > 100:
            assert rate >= tail - 3 * standard_error


def _distances(x: np.ndarray, means: np.ndarray, covariances: np.ndarray) -> np.ndarray:
    """Mahalanobis distance of x to every class, by scipy (the oracle)."""
    return np.array([mahalanobis(x, m, np.linalg.inv(c)) for m, c in zip(means, covariances, strict=True)])


def test_rows_twenty_standard_deviations_from_every_class_are_always_deferred_as_novelty() -> None:
    means, covariances = three_classes(4, 3.0)
    rule = novelty_rule(means, covariances, 0.999)
    rng = np.random.default_rng(2)
    directions = rng.standard_normal((200, 4))
    directions /= np.linalg.norm(directions, axis=1, keepdims=True)
    rows = []
    for direction in directions:
        radius = 1.0
        while _distances(radius * direction, means, covariances).min() < 20.0:
            radius *= 1.5
        rows.append(radius * direction)
    explanation = rule.explain(np.array(rows))
    assert (explanation.reason == "novelty").all()
    assert (explanation.action_name == "reject").all()
    assert np.isnan(explanation.margin).all() and explanation.valid.all()


def test_a_row_at_99_percent_of_the_threshold_is_not_deferred_as_novelty_and_at_101_percent_it_is() -> None:
    # classes far apart, so only the nearest class's distance matters
    means, covariances = three_classes(3, 1000.0)
    rule = novelty_rule(means, covariances, 0.999)
    threshold = scipy.stats.chi2.ppf(0.999, 3)
    rng = np.random.default_rng(3)
    for k in range(3):
        factor = np.linalg.cholesky(covariances[k])
        direction = rng.standard_normal(3)
        direction /= np.linalg.norm(direction)
        for share, novel in ((0.99, False), (1.01, True)):
            x = means[k] + factor @ (direction * np.sqrt(share * threshold))  # D² = share × threshold
            assert _distances(x, means, covariances)[k] ** 2 == pytest.approx(share * threshold, rel=1e-9)
            assert (rule.explain(x[None, :]).reason[0] == "novelty") is novel


def test_novelty_is_a_row_beyond_the_threshold_for_every_class_with_a_non_zero_prior() -> None:
    # NOV-1: distance reject; a class with prior 0 cannot be decided, so being near it does not count
    means, covariances = three_classes(2, 4.0, seed=5)
    rule = novelty_rule(means, covariances, 0.95, priors=[0.5, 0.5, 0.0])
    threshold = scipy.stats.chi2.ppf(0.95, 2)
    rows = np.random.default_rng(6).uniform(-12.0, 12.0, size=(3000, 2))
    squared = np.array([_distances(x, means, covariances) ** 2 for x in rows])
    expected = (squared[:, :2] > threshold).all(axis=1)
    assert expected.any() and (~expected).any()
    assert ((squared[:, 2] < threshold) & expected).any()  # near the zero-prior class only: still novel
    explanation = rule.explain(rows)
    np.testing.assert_array_equal(explanation.reason == "novelty", expected)
    np.testing.assert_array_equal(explanation.action_name[expected], "reject")


def test_the_standalone_module_defers_the_same_rows_bit_for_bit(tmp_path: Path) -> None:
    means, covariances = three_classes(4, 3.0)
    rule = novelty_rule(means, covariances, 0.99)
    rows = np.random.default_rng(7).normal(0.0, 6.0, size=(5000, 4))
    module = standalone(rule, tmp_path)
    decided = rule.decide(rows)
    assert (rule.explain(rows).reason == "novelty").sum() > 100
    np.testing.assert_array_equal(module.decide(rows), decided)
    assert module.posteriors(rows).tobytes() == rule.posteriors(rows).tobytes()
    assert module.risks(rows).tobytes() == rule.risks(rows).tobytes()


def test_every_decision_path_defers_a_novel_row(tmp_path: Path) -> None:
    # batch decide, the one-row path, decide_one, explain and the standalone module agree on novelty
    means, covariances = three_classes(2, 3.0)
    rule = novelty_rule(means, covariances, 0.999)
    far, near = np.array([40.0, -40.0]), means[0]
    assert rule.explain(np.array([far, near])).reason.tolist() == ["novelty", "min-risk"]
    assert rule.decide_names(np.array([far, near])).tolist()[0] == "reject"
    assert rule.decide_names(far[None, :]).tolist() == ["reject"]
    assert rule.decide_one({"x0": far[0], "x1": far[1]}) == "reject"
    assert rule.decide_one({"x0": near[0], "x1": near[1]}) != "reject"
    assert standalone(rule, tmp_path).decide(far[None, :]).tolist() == [rule.actions.index("reject")]
