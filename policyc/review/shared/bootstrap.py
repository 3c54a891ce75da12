"""Percentile bootstrap intervals for means of per-row values that take few distinct values.

A row's loss under a rule is fixed by a few categorical facts: (true class,
action) for one rule, (true class, old action, new action) for a pair of
rules. Resampling n rows with replacement then only changes how many rows fall
in each category, and those counts follow a multinomial law with the observed
shares. So the bootstrap runs on the category counts, never on the rows: memory
stays O(categories) however large the file, and the rows can be streamed in
batches. Pairing is structural: a category holds both rules' decisions for the
same row, so a resample keeps each row's old and new loss together.
"""

from __future__ import annotations

import numpy as np
from pydantic.dataclasses import dataclass

from policyc.review.shared.reports import REPORT_CONFIG

__all__ = ["DEFAULT_CONFIDENCE", "DEFAULT_RESAMPLES", "DEFAULT_SEED", "BootstrapInterval", "categorical_mean_interval"]

DEFAULT_CONFIDENCE = 0.95
DEFAULT_RESAMPLES = 2000
DEFAULT_SEED = 0

METHOD = "percentile bootstrap, rows resampled with replacement (multinomial on category counts)"


@dataclass(frozen=True, config=REPORT_CONFIG)
class BootstrapInterval:
    """A point estimate with its percentile bootstrap interval [low, high]."""

    estimate: float
    low: float
    high: float
    confidence: float
    resamples: int
    seed: int
    method: str = METHOD


def categorical_mean_interval(
    counts: np.ndarray,
    values: np.ndarray,
    confidence: float = DEFAULT_CONFIDENCE,
    resamples: int = DEFAULT_RESAMPLES,
    seed: int = DEFAULT_SEED,
) -> BootstrapInterval:
    """Percentile bootstrap interval of the mean of per-row values, from category counts.

    Parameters
    ----------
    counts : array of int, any shape
        Rows observed in each category.
    values : array of float, same shape as ``counts``
        The per-row value of each category (e.g. a loss, or a paired difference of losses).
    confidence : float
        Two-sided confidence level in (0, 1).
    resamples : int
        Bootstrap resamples B.
    seed : int
        Seed of the numpy generator, so a report is reproducible.

    Returns
    -------
    BootstrapInterval
        NaN everywhere when there are no rows.

    Notes
    -----
    Estimate: θ̂ = Σ_c n_c v_c / n. Resample b draws m⁽ᵇ⁾ ~ Multinomial(n, n_c / n), which is the
    law of the category counts of n rows drawn with replacement, and θ*⁽ᵇ⁾ = Σ_c m⁽ᵇ⁾_c v_c / n.
    The interval is the (α/2, 1 − α/2) quantiles of θ*, α = 1 − confidence (the percentile
    interval; Efron & Tibshirani 1993, *An Introduction to the Bootstrap*, ch. 13).

    Examples
    --------
    >>> interval = categorical_mean_interval(np.array([90, 10]), np.array([0.0, 1.0]))
    >>> round(interval.estimate, 3)
    0.1
    """
    counts = np.asarray(counts, dtype=np.int64).ravel()
    values = np.asarray(values, dtype=np.float64).ravel()
    n = int(counts.sum())
    if n == 0:
        return BootstrapInterval(float("nan"), float("nan"), float("nan"), confidence, resamples, seed)
    used = counts > 0
    counts, values = counts[used], values[used]
    estimate = float(counts @ values) / n  # θ̂ = Σ_c n_c v_c / n
    rng = np.random.default_rng(seed)
    # m^(b) ~ Multinomial(n, n_c / n): the category counts of n rows drawn with replacement
    draws = rng.multinomial(n, counts / n, size=resamples)
    replicates = draws @ values / n  # θ*^(b) = Σ_c m_c^(b) v_c / n
    alpha = 1.0 - confidence
    low, high = np.quantile(replicates, [alpha / 2.0, 1.0 - alpha / 2.0])  # percentile interval
    return BootstrapInterval(estimate, float(low), float(high), confidence, resamples, seed)
