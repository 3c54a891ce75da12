"""Uniform points on the probability simplex, and where two loss matrices decide differently."""

from __future__ import annotations

import math

import numpy as np
from scipy.stats import qmc

from policyc.geometry.decisions import decide_on_posteriors

__all__ = ["DEFAULT_SIMPLEX_SAMPLES", "SIMPLEX_REPLICATES", "decision_pair_shares", "mean_and_se", "simplex_points"]

DEFAULT_SIMPLEX_SAMPLES = 1 << 14

SIMPLEX_REPLICATES = 16

"""Independent scrambles of the Sobol sequence; their spread gives the standard error."""


def simplex_points(n_classes: int, n_points: int, seed: int) -> np.ndarray:
    """Scrambled Sobol points mapped to the uniform distribution on the probability simplex.

    Parameters
    ----------
    n_classes : int
        K, the dimension of the posterior vectors.
    n_points : int
        A power of two (Sobol balance properties hold for powers of two).
    seed : int or numpy SeedSequence entropy
        Seed of the scramble.

    Returns
    -------
    array of shape (n_points, K), rows summing to 1

    Notes
    -----
    With U uniform on [0, 1)^K, E_k = -ln(1 - U_k) are independent Exp(1) and p = E / Σ_j E_j is
    uniform on the simplex, i.e. Dirichlet(1, ..., 1) (Devroye 1986, *Non-Uniform Random Variate
    Generation*, ch. V, exponential spacings). The map is smooth, so the low discrepancy of the
    scrambled Sobol points carries over better than with sorting.
    """
    sobol = qmc.Sobol(d=n_classes, scramble=True, rng=np.random.default_rng(seed))
    u = sobol.random_base2(int(math.log2(n_points)))
    exponential = np.maximum(-np.log1p(-u), np.finfo(float).tiny)  # E_k = -ln(1 - U_k) ~ Exp(1)
    return exponential / exponential.sum(axis=1, keepdims=True)  # p = E / Σ E ~ Dirichlet(1, ..., 1)


def decision_pair_shares(old_loss: np.ndarray, new_loss: np.ndarray, samples: int, seed: int) -> np.ndarray:
    """Share of the simplex (uniform measure) where ``old_loss`` picks row a and ``new_loss`` picks row b.

    Parameters
    ----------
    old_loss, new_loss : arrays of shape (A_old, K) and (A_new, K), columns in the same class order
    samples : int
        Points in all; each of the ``SIMPLEX_REPLICATES`` scrambles takes ``samples // SIMPLEX_REPLICATES``.
    seed : int
        Seed of the scrambles.

    Returns
    -------
    array of shape (SIMPLEX_REPLICATES, A_old, A_new): one estimate per independent scramble

    Notes
    -----
    Share estimate = mean of the R replicate shares; SE = sd(replicate shares, ddof 1) / √R
    (randomised quasi-Monte Carlo; Owen 1997, "Monte Carlo variance of scrambled net quadrature").
    """
    n_old, n_new = old_loss.shape[0], new_loss.shape[0]
    per_replicate = samples // SIMPLEX_REPLICATES
    pair_shares = np.zeros((SIMPLEX_REPLICATES, n_old, n_new))
    children = np.random.SeedSequence(seed).spawn(SIMPLEX_REPLICATES)
    for r, child in enumerate(children):
        points = simplex_points(old_loss.shape[1], per_replicate, child.generate_state(1)[0])
        flat = decide_on_posteriors(old_loss, points) * n_new + decide_on_posteriors(new_loss, points)
        counts = np.bincount(flat, minlength=n_old * n_new)
        # share of (old a, new b) in replicate r = points where old chooses a and new chooses b / points
        pair_shares[r] = counts.reshape(n_old, n_new) / per_replicate
    return pair_shares


def mean_and_se(replicates: np.ndarray) -> tuple[float, float]:
    # mean of R replicate estimates and its standard error sd / √R
    return float(replicates.mean()), float(replicates.std(ddof=1) / math.sqrt(replicates.size))
