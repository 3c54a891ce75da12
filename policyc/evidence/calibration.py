"""Calibration maps for posterior evidence, fitted on labelled data and compiled into the rule.

Three methods (docs/math.md §5.4 has the derivations):

* ``temperature`` (Guo, Pleiss, Sun & Weinberger 2017): q ∝ p^(1/T), one T > 0 by maximum likelihood;
* ``dirichlet`` (Kull et al. 2019): q = softmax(W ln p + b) by maximum likelihood, with an optional
  off-diagonal and intercept penalty; unpenalised it is multinomial logistic regression on ln p;
* ``isotonic`` (Zadrozny & Elkan 2002): per class, the isotonic regression of the class indicator on its
  probability (pool-adjacent-violators), linear between fitted points, clipped outside; rows renormalised.

Logarithms of probabilities use max(p, PROBABILITY_FLOOR), so probabilities at or above the floor are
calibrated exactly as the formulas say. The fitted map is a handful of float64 arrays whose names start
with ``calibration_``; the runtime kernel applies them (numpy only).
"""

from __future__ import annotations

from dataclasses import dataclass
from pathlib import Path

import numpy as np
from scipy.optimize import brentq, minimize

from policyc.errors import DataError, FitProblem
from policyc.evidence.io import read_feature_batches
from policyc.files import file_sha256
from policyc.language.model import CalibrationFit, Policy, PosteriorEvidence

__all__ = [
    "CALIBRATE_PATH",
    "ECE_BINS",
    "PROBABILITY_FLOOR",
    "TIE_RESOLUTION",
    "CalibrationSample",
    "brier_score",
    "expected_calibration_error",
    "fit_dirichlet",
    "fit_isotonic",
    "fit_map",
    "fit_temperature",
    "isotonic_regression",
    "log_loss",
    "read_sample",
]

CALIBRATE_PATH = ("evidence", "calibrate")
"""Where fit problems of the calibration map are located in the policy."""

PROBABILITY_FLOOR = 1e-12
"""ln p is taken of max(p, 1e-12): an exact zero has no logarithm; above the floor nothing changes."""

ECE_BINS = 15
"""Equal-width confidence bins of the expected calibration error (the number Guo et al. 2017 use, from memory)."""

TIE_RESOLUTION = float(np.finfo(np.float64).resolution)
"""Probabilities closer than 1e-15 count as one value in an isotonic fit (as scikit-learn's IsotonicRegression
pools them): a step between them would be a fit to rounding noise."""

_GRADIENT_TOLERANCE = 1e-8
"""Largest gradient entry of the mean log-likelihood accepted as a dirichlet optimum (common practice, no source)."""

_LARGEST_INVERSE_TEMPERATURE = 1e6
"""1/T beyond this means the likelihood keeps growing as T -> 0: the labels are separated by the ranking."""


@dataclass(frozen=True)
class CalibrationSample:
    """Labelled upstream probabilities: (n, K) rows in class order, class codes (n,), file facts."""

    probabilities: np.ndarray
    codes: np.ndarray
    sha256: str
    class_counts: tuple[int, ...]

    @property
    def class_frequencies(self) -> np.ndarray:
        counts = np.asarray(self.class_counts, dtype=float)
        return counts / counts.sum()


def _log_probabilities(probabilities: np.ndarray) -> np.ndarray:
    # ln max(p, ε): the kernel takes the same floor from the artefact's calibration_floor
    return np.log(np.maximum(probabilities, PROBABILITY_FLOOR))


def read_sample(
    policy: Policy, evidence: PosteriorEvidence, fit: CalibrationFit, base_dir: Path | None
) -> CalibrationSample:
    """Read the calibration file: the evidence columns in class order and the labels; refuse unusable rows."""
    path = Path(fit.data)
    if base_dir is not None and not path.is_absolute():
        path = base_dir / path
    columns = [evidence.columns[name] for name in policy.classes]
    try:
        return _read(path, policy, evidence, fit, columns)
    except DataError as error:
        raise FitProblem("calibration-data-unusable", str(error), path=CALIBRATE_PATH) from None


def _read(
    path: Path, policy: Policy, evidence: PosteriorEvidence, fit: CalibrationFit, columns: list[str]
) -> CalibrationSample:
    blocks, codes = [], []
    for batch in read_feature_batches(path, columns, fit.label, classes=policy.classes):
        batch_codes = batch.class_codes(policy.classes)
        unknown = batch.first_unknown_label(batch_codes)
        if unknown is not None:
            raise FitProblem(
                "calibration-data-unusable",
                f"{path}: column {fit.label!r}, row {unknown[0]}: label {unknown[1]!r} is not a class",
                path=CALIBRATE_PATH,
            )
        _require_probabilities(path, batch.features, batch.first_row, evidence)
        blocks.append(batch.features)
        codes.append(batch_codes)
    probabilities = np.vstack(blocks) if blocks else np.empty((0, len(columns)))
    if evidence.renormalise:
        probabilities = probabilities / probabilities.sum(axis=1, keepdims=True)
    all_codes = np.concatenate(codes) if codes else np.empty(0, dtype=np.int64)
    counts = tuple(int(c) for c in np.bincount(all_codes, minlength=len(policy.classes)))
    return CalibrationSample(probabilities, all_codes, file_sha256(path), counts)


def _require_probabilities(path: Path, rows: np.ndarray, first_row: int, evidence: PosteriorEvidence) -> None:
    """The rows the rule would accept as input: finite, in [0, 1], summing to 1 (or positive, to renormalise)."""
    sums = rows.sum(axis=1)
    usable = np.isfinite(rows).all(axis=1) & (rows >= 0.0).all(axis=1)
    if evidence.renormalise:
        usable &= sums > 0.0
    else:
        usable &= (rows <= 1.0).all(axis=1) & (np.abs(sums - 1.0) <= evidence.sum_tolerance)
    if not usable.all():
        row = first_row + int(np.flatnonzero(~usable)[0])
        raise FitProblem(
            "calibration-data-unusable",
            f"{path}: row {row} is not a probability row (NaN, outside [0, 1], or a sum away from 1 by more "
            f"than {evidence.sum_tolerance:g})",
            path=CALIBRATE_PATH,
        )


# --- the three fits ----------------------------------------------------------------------------------


def fit_temperature(probabilities: np.ndarray, codes: np.ndarray) -> float:
    """Temperature T > 0 maximising the likelihood of q ∝ p^(1/T) (Guo et al. 2017, §4.2).

    Parameters
    ----------
    probabilities : array of shape (n, K)
        Upstream probabilities, rows in class order.
    codes : array of shape (n,)
        Class index of each row's label.

    Returns
    -------
    float
        The temperature T.

    Notes
    -----
    With z = ln max(p, ε) and β = 1/T, NLL(β) = Σ_i [logsumexp_k(β z_ik) − β z_iy] is convex in β;
    its derivative Σ_i [E_q(z_i) − z_iy] is increasing, so its root is found by bracketing (Brent).
    No root for β > 0 means the probabilities rank the labels no better than chance (T would be
    negative) or perfectly (T -> 0): both are refused.

    References
    ----------
    C. Guo, G. Pleiss, Y. Sun, K. Q. Weinberger, "On Calibration of Modern Neural Networks", ICML 2017.
    """
    z = _log_probabilities(probabilities)
    z_true = z[np.arange(z.shape[0]), codes]

    def slope(beta: float) -> float:
        # dNLL/dβ = Σ_i [Σ_k q_ik z_ik − z_iy],  q_i = softmax(β z_i)
        scaled = beta * z
        q = np.exp(scaled - scaled.max(axis=1, keepdims=True))
        q /= q.sum(axis=1, keepdims=True)
        return float(np.sum(np.einsum("ik,ik->i", q, z) - z_true))

    if slope(0.0) >= 0.0:
        raise FitProblem(
            "calibration-not-fitted",
            "the upstream probabilities predict the calibration labels no better than a uniform guess; "
            "no temperature T > 0 calibrates them",
            path=CALIBRATE_PATH,
        )
    high = 1.0
    # when every row ranks its label first, the slope stays below 0 and underflows to exactly 0 as β grows
    while slope(high) <= 0.0:
        high *= 2.0
        if high > _LARGEST_INVERSE_TEMPERATURE:
            raise FitProblem(
                "calibration-not-fitted",
                "the upstream probabilities rank every calibration label first, so the likelihood grows without "
                "bound as T -> 0",
                "add calibration rows the upstream model gets wrong, or use method: isotonic",
                path=CALIBRATE_PATH,
            )
    beta = brentq(slope, 0.0, high, xtol=1e-14, rtol=4 * np.finfo(float).eps)
    return 1.0 / float(beta)


def fit_dirichlet(
    probabilities: np.ndarray, codes: np.ndarray, regularisation: float = 0.0
) -> tuple[np.ndarray, np.ndarray]:
    """W (K, K) and b (K,) of q = softmax(W ln p + b) by (penalised) maximum likelihood (Kull et al. 2019).

    Parameters
    ----------
    probabilities : array of shape (n, K)
        Upstream probabilities, rows in class order.
    codes : array of shape (n,)
        Class index of each row's label.
    regularisation : float
        λ of the penalty λ [Σ_{i≠j} w_ij² / (K(K−1)) + Σ_j b_j² / K] added to the mean negative
        log-likelihood (the off-diagonal and intercept regularisation of Kull et al. 2019, §4, with one
        weight for both parts). 0 is plain maximum likelihood: multinomial logistic regression on ln p.

    Returns
    -------
    tuple of arrays of shape (K, K) and (K,)

    Notes
    -----
    The objective is convex; a trust-region Newton method (exact Hessian, K(K+1) parameters) starts at
    the identity map (W = I, b = 0, q = p) and only ever accepts steps that lower it, so the fitted
    log-loss on the calibration data is never worse than the input's.
    XXX: unpenalised, calibration data that W ln p + b separates perfectly has no finite optimum; the
    fit then fails to converge or stops at large weights. Use a small regularisation for such data.

    References
    ----------
    M. Kull, M. Perello-Nieto, M. Kängsepp, T. Silva Filho, H. Song, P. Flach, "Beyond temperature
    scaling: Obtaining well-calibrated multi-class probabilities with Dirichlet calibration",
    NeurIPS 32 (2019), pp. 12316–12326.
    """
    z = _log_probabilities(probabilities)
    n, k = z.shape
    onehot = np.eye(k)[codes]
    off_diagonal = 1.0 - np.eye(k)
    off_weight = regularisation / (k * (k - 1))
    bias_weight = regularisation / k

    design = np.hstack([z, np.ones((n, 1))])  # z̃ = (ln p, 1): θ_k = (w_k, b_k) scores s_k = θ_k · z̃
    penalty = np.zeros((k, k + 1))
    penalty[:, :k] = off_weight * off_diagonal
    penalty[:, k] = bias_weight

    def objective(theta: np.ndarray) -> float:
        scores = design @ theta.reshape(k, k + 1).T
        top = scores.max(axis=1, keepdims=True)
        # NLL = (1/n) Σ_i [logsumexp_k s_ik − s_iy]
        log_norm = top[:, 0] + np.log(np.exp(scores - top).sum(axis=1))
        return float(np.sum(log_norm - np.sum(scores * onehot, axis=1))) / n + float(np.sum(penalty.ravel() * theta**2))

    def probabilities_at(theta: np.ndarray) -> np.ndarray:
        scores = design @ theta.reshape(k, k + 1).T
        q = np.exp(scores - scores.max(axis=1, keepdims=True))
        return q / q.sum(axis=1, keepdims=True)

    def gradient(theta: np.ndarray) -> np.ndarray:
        # ∂/∂θ_k = (1/n) Σ_i (q_ik − 1[y_i = k]) z̃_i + 2 penalty_k θ_k
        residual = (probabilities_at(theta) - onehot) / n
        return (residual.T @ design).ravel() + 2.0 * penalty.ravel() * theta

    def hessian(theta: np.ndarray) -> np.ndarray:
        # ∂²/∂θ_k∂θ_l = (1/n) Σ_i q_ik (δ_kl − q_il) z̃_i z̃_iᵀ + 2 diag(penalty)
        q = probabilities_at(theta)
        weights = (np.einsum("ik,kl->ikl", q, np.eye(k)) - np.einsum("ik,il->ikl", q, q)) / n
        block = np.einsum("ikl,ia,ib->kalb", weights, design, design).reshape(k * (k + 1), k * (k + 1))
        return block + np.diag(2.0 * penalty.ravel())

    start = np.hstack([np.eye(k), np.zeros((k, 1))]).ravel()
    result = minimize(
        objective, start, jac=gradient, hess=hessian, method="trust-exact", options={"gtol": 1e-10, "maxiter": 500}
    )
    theta = result.x.reshape(k, k + 1)
    # the trust region may stop once rounding hides further progress; a vanishing gradient is convergence
    converged = result.success or float(np.max(np.abs(gradient(result.x)))) <= _GRADIENT_TOLERANCE
    if not converged or not np.all(np.isfinite(theta)):
        raise FitProblem(
            "calibration-not-fitted",
            f"the dirichlet calibration fit did not converge ({result.message})",
            "the calibration data may be separable by the upstream probabilities; set a small regularisation:",
            path=CALIBRATE_PATH,
        )
    return theta[:, :k], theta[:, k]


def isotonic_regression(x: np.ndarray, y: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """Non-decreasing least-squares fit of y on x by pool-adjacent-violators.

    Parameters
    ----------
    x, y : arrays of shape (n,)

    Returns
    -------
    thresholds, values : arrays of shape (m,)
        The distinct x (only the ends of each constant stretch, which leaves the linear interpolation
        unchanged) and the fitted values there; between them the fit is linear, outside it is clipped.

    Notes
    -----
    Equal x (closer than TIE_RESOLUTION to the first of their group) are pooled first (their mean y,
    weighted by their count); then adjacent blocks whose means
    decrease are merged into their weighted mean until the sequence is non-decreasing (Barlow, Bartholomew,
    Bremner & Brunk 1972; from memory), the fit scikit-learn's ``IsotonicRegression`` computes.
    """
    order = np.argsort(x, kind="stable")
    distinct, starts = _pooled_starts(x[order])
    weights = np.diff(np.append(starts, x.size)).astype(float)
    means = np.add.reduceat(y[order].astype(float), starts) / weights
    block_mean: list[float] = []
    block_weight: list[float] = []
    block_size: list[int] = []
    for mean, weight in zip(means.tolist(), weights.tolist(), strict=True):
        block_mean.append(mean)
        block_weight.append(weight)
        block_size.append(1)
        while len(block_mean) > 1 and block_mean[-2] >= block_mean[-1]:
            # pool: (w_a m_a + w_b m_b) / (w_a + w_b)
            weight_b, mean_b, size_b = block_weight.pop(), block_mean.pop(), block_size.pop()
            total = block_weight[-1] + weight_b
            block_mean[-1] = (block_weight[-1] * block_mean[-1] + weight_b * mean_b) / total
            block_weight[-1] = total
            block_size[-1] += size_b
    fitted = np.repeat(block_mean, block_size)
    ends = np.cumsum(block_size)
    keep = np.unique(np.concatenate([ends - np.asarray(block_size), ends - 1]))
    return distinct[keep], fitted[keep]


def _pooled_starts(sorted_x: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """Group sorted x into ties: a group starts at the first value at least TIE_RESOLUTION above the previous
    group's first value. Returns each group's first value and its start index."""
    firsts, starts = [], []
    distinct, distinct_starts = np.unique(sorted_x, return_index=True)
    current = -np.inf
    for value, start in zip(distinct.tolist(), distinct_starts.tolist(), strict=True):
        if value - current >= TIE_RESOLUTION:
            firsts.append(value)
            starts.append(start)
            current = value
    return np.array(firsts), np.array(starts, dtype=np.int64)


def fit_isotonic(probabilities: np.ndarray, codes: np.ndarray) -> list[tuple[np.ndarray, np.ndarray]]:
    """One-vs-rest isotonic maps: for each class k, the isotonic regression of 1[y = k] on p_k (Zadrozny & Elkan 2002).

    References
    ----------
    B. Zadrozny, C. Elkan, "Transforming classifier scores into accurate multiclass probability
    estimates", KDD 2002.
    """
    return [isotonic_regression(probabilities[:, k], (codes == k).astype(float)) for k in range(probabilities.shape[1])]


def fit_map(fit: CalibrationFit, sample: CalibrationSample) -> dict[str, np.ndarray]:
    """The fitted map as kernel arrays (``calibration_*``), floor included."""
    params = {"calibration_floor": np.array(PROBABILITY_FLOOR)}
    p, y = sample.probabilities, sample.codes
    if fit.method == "temperature":
        params["calibration_inverse_temperature"] = np.array(1.0 / fit_temperature(p, y))
    elif fit.method == "dirichlet":
        weights, bias = fit_dirichlet(p, y, fit.regularisation or 0.0)
        params |= {"calibration_weights": weights, "calibration_bias": bias}
    else:
        pieces = fit_isotonic(p, y)
        params |= {
            "calibration_thresholds": np.concatenate([x for x, _ in pieces]),
            "calibration_values": np.concatenate([v for _, v in pieces]),
            "calibration_ends": np.cumsum([x.size for x, _ in pieces]).astype(float),
        }
    return params


# --- scores --------------------------------------------------------------------------------------


def log_loss(probabilities: np.ndarray, codes: np.ndarray) -> float:
    """Mean negative log-likelihood −(1/n) Σ_i ln max(q_iy, ε)."""
    return float(-np.mean(_log_probabilities(probabilities[np.arange(codes.size), codes])))


def brier_score(probabilities: np.ndarray, codes: np.ndarray) -> float:
    """Brier score (1/n) Σ_i Σ_k (q_ik − 1[y_i = k])² (Brier 1950, multi-class form; CAL-5)."""
    onehot = np.eye(probabilities.shape[1])[codes]
    return float(np.mean(np.sum((probabilities - onehot) ** 2, axis=1)))


def expected_calibration_error(probabilities: np.ndarray, codes: np.ndarray, bins: int = ECE_BINS) -> float:
    """ECE = Σ_b (n_b / n) |acc_b − conf_b| over equal-width bins of the top probability (Naeini et al. 2015;
    Guo et al. 2017 §2; CAL-5). Bins are right-closed, ((b−1)/B, b/B], the first one [0, 1/B]."""
    confidence = probabilities.max(axis=1)
    correct = (probabilities.argmax(axis=1) == codes).astype(float)
    index = np.clip(np.ceil(confidence * bins).astype(int) - 1, 0, bins - 1)
    accuracy_sum = np.bincount(index, weights=correct, minlength=bins)
    confidence_sum = np.bincount(index, weights=confidence, minlength=bins)
    # Σ_b (n_b/n)|acc_b − conf_b| = (1/n) Σ_b |Σ_{i∈b} correct_i − Σ_{i∈b} conf_i|
    return float(np.sum(np.abs(accuracy_sum - confidence_sum)) / codes.size)
