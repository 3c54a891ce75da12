"""Bayes error of compiled Gaussian rules against closed forms and Fukunaga's standard data sets.

The rules are built from exact parameters (no fitting) through the compiler's own
``kernel_params`` and ``rule_from_parts``; see ``helpers.gaussian_rule``.
"""

from __future__ import annotations

import numpy as np
import pytest
import scipy.stats
from helpers import gaussian_rule, random_spd

from policyc.runtime import Rule

ZERO_ONE = np.array([[0.0, 1.0], [1.0, 0.0]])
N_PER_CLASS = 100_000


def sampled_error(rule: Rule, means: np.ndarray, covariances: np.ndarray, priors: np.ndarray, seed: int):
    """Error rate of ``rule`` on a class-stratified seeded sample, and its standard error.

    ε̂ = Σ_j P_j ε̂_j with ε̂_j the error among N_PER_CLASS draws of class j;
    s.e. = sqrt(Σ_j P_j² ε_j(1 - ε_j) / N_PER_CLASS).
    """
    rng = np.random.default_rng(seed)
    errors = []
    for j, (mean, covariance) in enumerate(zip(means, covariances, strict=True)):
        X = rng.multivariate_normal(mean, covariance, size=N_PER_CLASS)
        errors.append(float(np.mean(rule.decide(X) != j)))
    errors_array = np.array(errors)
    estimate = float(priors @ errors_array)
    standard_error = float(np.sqrt(np.sum(priors**2 * errors_array * (1.0 - errors_array)) / N_PER_CLASS))
    return estimate, standard_error


def boundary_along(rule: Rule, start: np.ndarray, direction: np.ndarray, low: float, high: float) -> float:
    """The s in [low, high] where decide(start + s·direction) changes (bisection on the rule's decisions)."""
    first = rule.decide((start + low * direction)[None, :])[0]
    assert rule.decide((start + high * direction)[None, :])[0] != first
    for _ in range(80):
        middle = 0.5 * (low + high)
        if rule.decide((start + middle * direction)[None, :])[0] == first:
            low = middle
        else:
            high = middle
    return 0.5 * (low + high)


def equal_covariance_error(delta: float, p1: float, log_theta: float | None = None) -> float:
    """Fukunaga 1990 eqs. 3.97-3.103 (references.md BE-1): L ~ N(±Δ²/2, Δ²), decide ω1 iff L > ln θ.

    θ = P2/P1 (the Bayes rule under 0-1 loss) unless another threshold is given.
    """
    if log_theta is None:
        log_theta = float(np.log((1.0 - p1) / p1))
    epsilon_1 = scipy.stats.norm.cdf((log_theta - delta**2 / 2) / delta)
    epsilon_2 = scipy.stats.norm.cdf((-log_theta - delta**2 / 2) / delta)
    return float(p1 * epsilon_1 + (1.0 - p1) * epsilon_2)


@pytest.mark.parametrize(("delta", "p1", "d"), [(2.0, 0.5, 3), (1.5, 0.3, 2), (3.0, 0.8, 5)])
def test_equal_covariance_bayes_error(delta: float, p1: float, d: int) -> None:
    rng = np.random.default_rng(int(10 * delta) + d)
    sigma = random_spd(rng, d)
    direction = rng.normal(size=d)
    # scale the mean difference to Mahalanobis distance Δ: Δ² = δᵀ Σ⁻¹ δ
    direction *= delta / np.sqrt(direction @ np.linalg.solve(sigma, direction))
    means = np.array([rng.normal(size=d), np.zeros(d)])
    means[1] = means[0] + direction
    covariances = np.array([sigma, sigma])
    priors = np.array([p1, 1.0 - p1])
    rule = gaussian_rule(means, covariances, priors, ZERO_ONE, covariance="tied")
    expected = equal_covariance_error(delta, p1)
    if p1 == 0.5:
        # references.md BE-1, equal priors: ε = Φ(-Δ/2)
        assert expected == pytest.approx(scipy.stats.norm.cdf(-delta / 2), abs=1e-15)

    # Exact: along x = μ1 + s(μ2 - μ1), L = Δ²(½ - s), so the rule should flip at s* = ½ - ln θ / Δ²
    # derived (references.md BE-1, PR-4). The error of a rule with that boundary is the closed form.
    s_found = boundary_along(rule, means[0], direction, -20.0, 20.0)
    log_theta = np.log((1.0 - p1) / p1)
    assert s_found == pytest.approx(0.5 - log_theta / delta**2, abs=1e-9)
    rule_error = equal_covariance_error(delta, p1, log_theta=delta**2 * (0.5 - s_found))
    assert rule_error == pytest.approx(expected, abs=1e-6)

    estimate, standard_error = sampled_error(rule, means, covariances, priors, seed=d)
    assert abs(estimate - expected) < 3.0 * standard_error


def test_fukunaga_data_i_i() -> None:
    # Fukunaga 1990 p. 46 Data I-I (references.md BE-2): n = 8, Σ1 = Σ2 = I, means 2.56 apart in one coordinate
    d = 8
    means = np.zeros((2, d))
    means[1, 0] = 2.56
    covariances = np.array([np.eye(d), np.eye(d)])
    priors = np.array([0.5, 0.5])
    exact = float(scipy.stats.norm.cdf(-2.56 / 2))  # Φ(-Δ/2), references.md BE-1
    assert exact == pytest.approx(0.100273, abs=5e-7)  # printed exact value (references.md BE-2)
    assert exact == pytest.approx(0.10, abs=5e-4)  # book value 10% (references.md BE-2)
    rule = gaussian_rule(means, covariances, priors, ZERO_ONE, covariance="tied")
    s_found = boundary_along(rule, means[0], means[1] - means[0], -5.0, 5.0)
    assert s_found == pytest.approx(0.5, abs=1e-9)
    estimate, standard_error = sampled_error(rule, means, covariances, priors, seed=11)
    assert abs(estimate - exact) < 3.0 * standard_error


def test_fukunaga_data_i_4i() -> None:
    # Fukunaga 1990 p. 46 Data I-4I (references.md BE-7): M1 = M2 = 0, Σ1 = I, Σ2 = 4I, n = 8
    d = 8
    means = np.zeros((2, d))
    covariances = np.array([np.eye(d), 4.0 * np.eye(d)])
    priors = np.array([0.5, 0.5])
    # derived (references.md BE-7): decide ω1 iff xᵀx < (32/3) ln 4;
    # ε = ½ P(χ²₈ > c) + ½ P(χ²₈ < c/4)
    c = 32.0 / 3.0 * np.log(4.0)
    assert c == pytest.approx(14.787140, abs=5e-7)
    exact = float(0.5 * scipy.stats.chi2.sf(c, d) + 0.5 * scipy.stats.chi2.cdf(c / 4.0, d))
    assert exact == pytest.approx(0.090013, abs=5e-7)  # printed exact value (references.md BE-7)
    assert exact == pytest.approx(0.09, abs=1e-3)  # book value "about 9%" (references.md BE-7)
    rule = gaussian_rule(means, covariances, priors, ZERO_ONE, covariance="full")
    # the log-determinant term puts the boundary on the sphere xᵀx = c, in every direction
    rng = np.random.default_rng(4)
    for _ in range(5):
        direction = rng.normal(size=d)
        direction /= np.linalg.norm(direction)
        radius = boundary_along(rule, np.zeros(d), direction, 0.0, 10.0)
        assert radius**2 == pytest.approx(c, abs=1e-6)
    estimate, standard_error = sampled_error(rule, means, covariances, priors, seed=12)
    assert abs(estimate - exact) < 3.0 * standard_error
