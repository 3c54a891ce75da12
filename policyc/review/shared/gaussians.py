"""Class-conditional Gaussian parameters read back from a compiled rule's kernel arrays."""

from __future__ import annotations

import hashlib

import numpy as np
from scipy.linalg import solve_triangular

from policyc.runtime import Rule

__all__ = ["gaussian_moments", "moments_digest"]


def gaussian_moments(rule: Rule) -> tuple[np.ndarray, np.ndarray]:
    """Class means (K, d) and covariances (K, d, d) rebuilt from a gaussian rule's kernel arrays.

    Notes
    -----
    The kernel stores W_k = L_k⁻¹ (Σ_k = L_k L_kᵀ) and w_k = W_k (μ_k − c) with c = ``centre``;
    so μ_k = c + L_k w_k and Σ_k = L_k L_kᵀ, with L_k = W_k⁻¹ from a triangular solve.
    """
    if rule.evidence != "gaussian":
        raise ValueError(f"the rule's evidence is {rule.evidence!r}, not gaussian")
    n_classes, n_features = len(rule.classes), len(rule.features)
    whitening = np.asarray(rule.params["whitening"]).reshape(n_classes, n_features, n_features)
    whitened = np.asarray(rule.params["whitened_means"]).reshape(n_classes, n_features)
    identity = np.eye(n_features)
    means = np.empty((n_classes, n_features))
    covariances = np.empty((n_classes, n_features, n_features))
    for k in range(n_classes):
        factor = solve_triangular(whitening[k], identity, lower=True)  # L_k = W_k⁻¹ (W_k lower triangular)
        means[k] = rule.params["centre"] + factor @ whitened[k]  # μ_k = c + L_k w_k
        covariances[k] = factor @ factor.T  # Σ_k = L_k L_kᵀ
    return means, covariances


def moments_digest(rule: Rule) -> str:
    """sha256 (first 12 hex digits) of the class means and covariances, classes in name order.

    Values are rounded to 9 significant digits first, so the digest does not depend on the class
    order of the policy or on the last bits of the fit.
    """
    means, covariances = gaussian_moments(rule)
    digest = hashlib.sha256()
    for name in sorted(rule.classes):
        k = rule.classes.index(name)
        values = np.concatenate([means[k], covariances[k].ravel()])
        digest.update(name.encode() + b"\0" + " ".join(f"{v:.9g}" for v in values).encode())
    return digest.hexdigest()[:12]
