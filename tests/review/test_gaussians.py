"""Gaussian parameters read back from a compiled rule, and their digest in the diff report."""

from __future__ import annotations

import numpy as np
from helpers import gaussian_rule, random_spd

from policyc.review.shared.gaussians import gaussian_moments, moments_digest

LOSS = 1.0 - np.eye(3)


def three_classes(shift: float = 0.0) -> tuple[np.ndarray, np.ndarray]:
    rng = np.random.default_rng(7)
    means = rng.normal(size=(3, 2)) + shift
    return means, np.array([random_spd(rng, 2) for _ in range(3)])


def test_means_and_covariances_come_back_from_the_whitening_factors() -> None:
    # Σ_k = L_k L_kᵀ with L_k = W_k⁻¹, μ_k = c + L_k w_k: the inverse of what the compiler stored
    means, covariances = three_classes()
    rule = gaussian_rule(means, covariances, [0.2, 0.3, 0.5], LOSS)
    read_means, read_covariances = gaussian_moments(rule)
    np.testing.assert_allclose(read_means, means, rtol=0.0, atol=1e-12)
    np.testing.assert_allclose(read_covariances, covariances, rtol=1e-12)


def test_the_digest_is_12_hex_digits_of_the_fit_whatever_the_priors() -> None:
    means, covariances = three_classes()
    digest = moments_digest(gaussian_rule(means, covariances, [0.2, 0.3, 0.5], LOSS))
    assert len(digest) == 12 and set(digest) <= set("0123456789abcdef")
    assert moments_digest(gaussian_rule(means, covariances, [0.6, 0.2, 0.2], LOSS)) == digest
    moved = means.copy()
    moved[1, 0] += 1e-6
    assert moments_digest(gaussian_rule(moved, covariances, [0.2, 0.3, 0.5], LOSS)) != digest
