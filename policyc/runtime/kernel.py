"""Decision kernels: evidence -> log-likelihoods -> posteriors -> conditional risks -> action.

This file imports numpy and the runtime's input reader (inputs.py) only:
``policyc compile --emit-python`` copies both files verbatim into the
standalone module, so the runtime and the module run the same code and give
bit-identical results. The full derivation is in docs/math.md.

Parameters arrive as a mapping of name to float64 array:

* every rule: ``log_priors`` (K,), ``loss`` (A, K) with the reject row, if any, last;
* gaussian: ``centre`` (d,), ``whitening`` (K*d, d) stacking L_k^-1 for Σ_k = L_k L_k^T,
  ``whitened_means`` (K*d,) stacking L_k^-1 (μ_k - centre), ``log_normalisers`` (K,);
* posterior: ``log_trained_priors`` (K,), ``sum_tolerance`` (), ``renormalise`` () as 0.0 or 1.0; with a fitted
  calibration map also ``calibration_floor`` () and one of: ``calibration_inverse_temperature`` ();
  ``calibration_weights`` (K, K) and ``calibration_bias`` (K,); ``calibration_thresholds`` (M,),
  ``calibration_values`` (M,) and ``calibration_ends`` (K,) (class k's points end at ends[k]);
* log-likelihood: nothing more.
"""

from __future__ import annotations

import numpy as np

from .inputs import InputError, feature_matrix

CHUNK_ROWS = 4096
"""Rows evaluated at once: bounds the (rows, K*d) work array whatever the input size."""

REASONS = ("min-risk", "invalid")
"""Why a row got its action: the minimum conditional risk (the reject action included, when the reject
cost is the minimum: Chow's ambiguity reject), or invalid input sent to the reject action."""


def evaluate(
    X: object, evidence: str, params: dict[str, np.ndarray], features: tuple[str, ...], invalid_input: str
) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """Posteriors, risks and validity for raw input; raise InputError on invalid rows under "error"."""
    prepared = feature_matrix(X, features)
    posteriors, risks, valid = posteriors_and_risks(prepared, evidence, params)
    if invalid_input == "error" and not valid.all():
        raise InputError(invalid_rows_message(valid, prepared=prepared, features=features))
    return posteriors, risks, valid


def gaussian_log_likelihoods(X: np.ndarray, params: dict[str, np.ndarray]) -> tuple[np.ndarray, np.ndarray]:
    """ln N(x; μ_k, Σ_k) for every class, and which rows could be evaluated.

    ln N(x; μ_k, Σ_k) = -½‖L_k⁻¹(x - μ_k)‖² - Σ_i ln (L_k)_ii - (d/2) ln 2π  (Σ_k = L_k L_kᵀ);
    log_normalisers holds the last two terms. All classes share one matrix product.
    """
    whitening = params["whitening"]
    n_classes = params["log_normalisers"].shape[0]
    n_features = whitening.shape[1]
    # z = L_k⁻¹(x - c) - L_k⁻¹(μ_k - c) = L_k⁻¹(x - μ_k), with c a common centre against cancellation.
    # Rows holding NaN or ±inf (inf·0 in the product) are marked invalid by the isfinite mask below, and rows
    # so large that every squared distance overflows get -inf everywhere and are marked invalid by _chunk;
    # their floating-point warnings are expected, so they are silenced rather than raised under -W error.
    with np.errstate(invalid="ignore", over="ignore"):
        z = (X - params["centre"]) @ whitening.T - params["whitened_means"]
        squared = np.einsum("nkd,nkd->nk", z.reshape(-1, n_classes, n_features), z.reshape(-1, n_classes, n_features))
    log_likelihoods = params["log_normalisers"] - 0.5 * squared
    return log_likelihoods, np.isfinite(X).all(axis=1)


def posterior_log_likelihoods(X: np.ndarray, params: dict[str, np.ndarray]) -> tuple[np.ndarray, np.ndarray]:
    """Upstream posteriors as log-likelihoods up to a per-row constant, and which rows are valid.

    p(x|k) ∝ p(k|x) / π_k with π the priors the upstream model was trained under, so
    ln p(k|x) - ln π_k + ln π̃_k gives the posterior under new priors π̃ after normalising
    (Saerens, Latinne & Decaestecker 2002, Neural Computation 14(1), eq. for known new priors).
    """
    sums = X.sum(axis=1)
    finite = np.isfinite(X).all(axis=1)
    in_range = ((X >= 0.0) & (X <= 1.0)).all(axis=1)
    if params["renormalise"] > 0.0:
        X = X / np.where(sums > 0.0, sums, 1.0)[:, None]
        valid = finite & (X >= 0.0).all(axis=1) & (sums > 0.0)
    else:
        valid = finite & in_range & (np.abs(sums - 1.0) <= params["sum_tolerance"])
    with np.errstate(divide="ignore", invalid="ignore"):
        log_likelihoods = calibrated_log_probabilities(X, params) - params["log_trained_priors"]
    return log_likelihoods, valid


def calibrated_log_probabilities(P: np.ndarray, params: dict[str, np.ndarray]) -> np.ndarray:
    """ln q(k|x) of the rule's calibration map, up to a per-row constant; ln p itself without a map.

    With z = ln max(p, ε) (ε = calibration_floor):
    temperature (Guo et al. 2017): ln q = z / T;  dirichlet (Kull et al. 2019): ln q = W z + b;
    isotonic (Zadrozny & Elkan 2002): q_k ∝ m_k(p_k), m_k piecewise linear through its fitted points,
    clipped outside; a row whose every m_k is 0 gets -inf everywhere and is invalid.
    """
    if "calibration_floor" not in params:
        return np.log(P)
    if "calibration_thresholds" in params:
        ends = params["calibration_ends"].astype(np.int64)
        starts = np.concatenate(([0], ends[:-1]))
        columns = [
            np.interp(P[:, k], params["calibration_thresholds"][a:b], params["calibration_values"][a:b])
            for k, (a, b) in enumerate(zip(starts, ends, strict=True))
        ]
        return np.log(np.stack(columns, axis=1))
    z = np.log(np.maximum(P, params["calibration_floor"]))
    if "calibration_inverse_temperature" in params:
        return z * params["calibration_inverse_temperature"]
    return z @ params["calibration_weights"].T + params["calibration_bias"]


def supplied_log_likelihoods(X: np.ndarray, params: dict[str, np.ndarray]) -> tuple[np.ndarray, np.ndarray]:
    """Per-class ln p(x|k) computed elsewhere; +inf is invalid, -inf means impossible."""
    valid = ~np.isnan(X).any(axis=1) & ~np.isposinf(X).any(axis=1)
    return X, valid


LOG_LIKELIHOODS = {
    "gaussian": gaussian_log_likelihoods,
    "posterior": posterior_log_likelihoods,
    "log-likelihood": supplied_log_likelihoods,
}


def posteriors_and_risks(
    X: np.ndarray, evidence: str, params: dict[str, np.ndarray]
) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """Posteriors (n, K), conditional risks (n, A) and a validity mask (n,) for prepared input.

    Rows that are not valid hold NaN. Work proceeds in chunks of CHUNK_ROWS rows.
    """
    n_rows = X.shape[0]
    n_classes = params["log_priors"].shape[0]
    posteriors = np.empty((n_rows, n_classes))
    risks = np.empty((n_rows, params["loss"].shape[0]))
    valid = np.empty(n_rows, dtype=bool)
    for start in range(0, n_rows, CHUNK_ROWS):
        rows = slice(start, start + CHUNK_ROWS)
        posteriors[rows], risks[rows], valid[rows] = _chunk(X[rows], evidence, params)
    return posteriors, risks, valid


def _chunk(X: np.ndarray, evidence: str, params: dict[str, np.ndarray]) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    log_likelihoods, valid = LOG_LIKELIHOODS[evidence](X, params)
    # ln P(k|x) = ln p(x|k) + ln P(k) - logsumexp_j(ln p(x|j) + ln P(j)); subtract the row max first
    with np.errstate(invalid="ignore"):
        joint = log_likelihoods + params["log_priors"]
        top = joint.max(axis=1, keepdims=True)
        valid = valid & np.isfinite(top[:, 0])
        joint = np.where(valid[:, None], joint - top, 0.0)
    unnormalised = np.exp(joint)
    posteriors = unnormalised / unnormalised.sum(axis=1, keepdims=True)
    # R(a|x) = Σ_k λ(a|k) P(k|x)   (Duda, Hart & Stork 2001, §2.2; Fukunaga 1990, eq. 3.19)
    risks = posteriors @ params["loss"].T
    # a constant row (the reject option) has risk exactly d, not d·ΣP(k|x) with ΣP = 1 ± ε
    constant = (params["loss"] == params["loss"][:, :1]).all(axis=1)
    risks[:, constant] = params["loss"][constant, 0]
    posteriors[~valid] = np.nan
    risks[~valid] = np.nan
    return posteriors, risks, valid


def choose(risks: np.ndarray, valid: np.ndarray, invalid_action: int) -> np.ndarray:
    """Index of the minimum-risk action per row; ties go to the earlier action.

    With the reject row last, argmin takes an action whenever min_a R(a|x) <= d and
    rejects when min_a R(a|x) > d (Chow 1970). Invalid rows get ``invalid_action``.
    """
    chosen = np.argmin(np.where(valid[:, None], risks, 0.0), axis=1)
    return np.where(valid, chosen, invalid_action)


def reasons(valid: np.ndarray) -> np.ndarray:
    """The reason for each row's action (an entry of REASONS), shape (n,)."""
    return np.asarray(REASONS)[np.where(valid, 0, 1)]


def invalid_rows_message(
    valid: np.ndarray,
    first_row: int = 0,
    *,
    prepared: np.ndarray | None = None,
    features: tuple[str, ...] = (),
) -> str:
    """Name the invalid rows, numbered from ``first_row`` (0 for array indices), and, given the prepared
    input and the feature names, the columns of each row that hold a missing, NaN or infinite value."""
    rows = np.flatnonzero(~valid)
    shown = ", ".join(str(row + first_row) for row in rows[:10])
    more = f" and {rows.size - 10} more" if rows.size > 10 else ""
    numbering = "0-based" if first_row == 0 else f"{first_row}-based"
    where = []
    if prepared is not None and features:
        for row in rows[:10]:
            columns = ", ".join(repr(features[j]) for j in np.flatnonzero(~np.isfinite(prepared[row])))
            where += [f"row {row + first_row}: {columns}"] if columns else []
    columns_named = f" ({'; '.join(where)})" if where else ""
    return (
        f"invalid input in row(s) {shown}{more} ({numbering}): missing, NaN, infinity or impossible evidence"
        + columns_named
    )
