"""Uniform simplex points and the shares of the simplex where two loss matrices decide differently.

Two classes make the shares exact: with P = (1 - p, p), the uniform distribution on the simplex is p uniform on
[0, 1] (Dirichlet(1, 1)), so the share where a rule picks an action is the length of an interval of p.
"""

from __future__ import annotations

import numpy as np
import pytest
from scipy import stats

from policyc.geometry.sampling import SIMPLEX_REPLICATES, decision_pair_shares, mean_and_se, simplex_points


@pytest.mark.parametrize("n_classes", [2, 3, 5])
def test_simplex_points_are_uniform_on_the_simplex(n_classes: int) -> None:
    points = simplex_points(n_classes, 4096, seed=3)
    assert points.shape == (4096, n_classes)
    assert points.min() > 0.0 and np.allclose(points.sum(axis=1), 1.0, rtol=0.0, atol=1e-12)
    # Dirichlet(1, ..., 1) has Beta(1, K - 1) marginals (scipy.stats.dirichlet / scipy.stats.beta); scrambled Sobol
    # points match the marginal far better than the 5% Kolmogorov-Smirnov critical value 1.36/√n for iid draws.
    for column in points.T:
        assert stats.kstest(column, stats.beta(1, n_classes - 1).cdf).statistic < 1.36 / np.sqrt(len(column))
    # the same scramble seed gives the same points; another seed other points
    assert np.array_equal(points, simplex_points(n_classes, 4096, seed=3))
    assert not np.allclose(points, simplex_points(n_classes, 4096, seed=4))


def test_simplex_points_keep_their_mean_and_covariance() -> None:
    # scipy.stats.dirichlet gives the mean 1/K and the covariance of Dirichlet(1, ..., 1); 4096 scrambled Sobol points
    # reproduce them to well within 2% of their size.
    points = simplex_points(4, 4096, seed=11)
    reference = stats.dirichlet(np.ones(4))
    assert points.mean(axis=0) == pytest.approx(reference.mean(), abs=0.02 / 4)
    assert np.cov(points, rowvar=False) == pytest.approx(reference.cov(), abs=0.02 * reference.var().max())


# Two classes, P(second) = p. Zero-one loss picks the first action for p < ½. With losses c01 = 3 (say first, truth
# second) and c10 = 1 the first action wins for p < 1/4 (Elkan 2001 §1.3, references.md EL-2: p* = c10 / (c10 + c01)).
# Adding a reject row of cost 0.5 to the second rule defers for p in (0.5/3, 1 - 0.5/1) = (1/6, 1/2)
# (references.md PR-7), so it picks: first on [0, 1/6), defer on (1/6, 1/2), second on (1/2, 1].
ZERO_ONE = np.array([[0.0, 1.0], [1.0, 0.0]])
COSTLY_SECOND = np.array([[0.0, 3.0], [1.0, 0.0], [0.5, 0.5]])
EXACT_SHARES = np.array(
    [
        [1 / 6, 0.0, 1 / 2 - 1 / 6],  # old first (p < ½): new first, second, defer
        [0.0, 1 / 2, 0.0],  # old second (p > ½)
    ]
)


def test_pair_shares_match_the_exact_intervals() -> None:
    shares = decision_pair_shares(ZERO_ONE, COSTLY_SECOND, samples=4096, seed=5)
    assert shares.shape == (SIMPLEX_REPLICATES, 2, 3)
    # every point of a replicate gets one old and one new decision: the shares of a replicate add up to 1
    assert np.allclose(shares.sum(axis=(1, 2)), 1.0, rtol=0.0, atol=1e-12)
    for a in range(2):
        for b in range(3):
            mean, error = mean_and_se(shares[:, a, b])
            # 256 points per replicate: an interval's share is off by at most about 1/256 (common practice, no source)
            assert mean == pytest.approx(EXACT_SHARES[a, b], abs=max(4 * error, 1 / 256))


def test_pair_shares_of_a_rule_with_itself_lie_on_the_diagonal() -> None:
    shares = decision_pair_shares(COSTLY_SECOND, COSTLY_SECOND, samples=1024, seed=2)
    off_diagonal = shares * (1 - np.eye(3))
    assert not off_diagonal.any()
    assert np.diagonal(shares.mean(axis=0)) == pytest.approx([1 / 6, 1 / 2, 1 / 3], abs=1 / 64)


def test_pair_shares_depend_on_the_seed_only() -> None:
    first = decision_pair_shares(ZERO_ONE, COSTLY_SECOND, samples=1024, seed=9)
    assert np.array_equal(first, decision_pair_shares(ZERO_ONE, COSTLY_SECOND, samples=1024, seed=9))
    assert not np.array_equal(first, decision_pair_shares(ZERO_ONE, COSTLY_SECOND, samples=1024, seed=10))


def test_mean_and_se_is_the_mean_and_scipys_standard_error() -> None:
    replicates = np.array([0.2, 0.25, 0.1, 0.4, 0.3])
    mean, error = mean_and_se(replicates)
    assert mean == pytest.approx(0.25, rel=1e-12)
    # scipy.stats.sem: sd with ddof 1 over √n
    assert error == pytest.approx(stats.sem(replicates), rel=1e-12)
