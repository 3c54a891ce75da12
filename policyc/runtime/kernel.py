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
* log-likelihood: nothing more;
* novelty reject (gaussian only): ``novelty_threshold`` (), the squared Mahalanobis distance beyond which a row is
  outside a class's region.
"""

from __future__ import annotations

import math

import numpy as np

from .inputs import InputError, feature_matrix

CHUNK_ROWS = 4096
"""Rows evaluated at once: bounds the (rows, K*d) work array whatever the input size."""

REASONS = ("min-risk", "novelty", "invalid")
"""Why a row got its action: the minimum conditional risk (the reject action included, when the reject
cost is the minimum: Chow's ambiguity reject), novelty (outside every class's region: distance reject), or
invalid input sent to the reject action."""


def plan(evidence: str, params: dict[str, np.ndarray], dtype: type = np.float64) -> dict[str, np.ndarray]:
    """The artefact's arrays plus what the kernels derive from them once per rule, in ``dtype``.

    The derived entries fold constants out of the per-row work, and pick the cheapest exact form of the
    Gaussian scores for the covariance structure the arrays have (see :func:`gaussian_scores`):
    ``loss_t`` (K, A) = λᵀ; ``constant_rows`` marks the reject row, whose risk is exactly its cost; for
    gaussian evidence ``form`` is 0 (full), 1 (tied: every L_k⁻¹ equal) or 2 (diagonal: every L_k⁻¹ diagonal).
    """
    derived: dict[str, np.ndarray] = {name: np.asarray(array, dtype=dtype) for name, array in params.items()}
    loss = params["loss"]
    derived["loss_t"] = np.ascontiguousarray(loss.T, dtype=dtype)
    derived["constant_rows"] = (loss == loss[:, :1]).all(axis=1)
    derived["constant_costs"] = loss[derived["constant_rows"], 0].astype(dtype)
    derived["class_ones"] = np.ones(loss.shape[1], dtype=dtype)
    # [λᵀ, 1] with the constant rows' columns zeroed: their risk is then 0 / Σ + cost = cost exactly (decide_row)
    varying = np.where(derived["constant_rows"][:, None], 0.0, loss)
    derived["loss_t_sum"] = np.hstack([varying.T, np.ones((loss.shape[1], 1))]).astype(dtype)
    derived["constant_shift"] = np.where(derived["constant_rows"], loss[:, 0], 0.0).astype(dtype)
    if evidence == "gaussian":
        derived |= {name: array.astype(dtype) for name, array in _gaussian_plan(params).items()}
    if "novelty_threshold" in params:
        # novelty needs every class's distance, which the tied and diagonal score forms never compute
        derived["augmented"] = augmented_whitening(params).astype(dtype)
        derived["novelty_classes"] = np.isfinite(params["log_priors"])  # classes with a non-zero prior
    return derived


def _gaussian_plan(params: dict[str, np.ndarray]) -> dict[str, np.ndarray]:
    """Folded arrays for the three covariance structures (tied and diagonal detected from the arrays)."""
    n_classes = params["log_normalisers"].shape[0]
    n_features = params["whitening"].shape[1]
    blocks = params["whitening"].reshape(n_classes, n_features, n_features)  # L_k⁻¹, one per class
    means = params["whitened_means"].reshape(n_classes, n_features)  # m_k = L_k⁻¹(μ_k - c)
    # score_k = ln P(k) + ln N(x; μ_k, Σ_k) (up to a per-row constant in the tied form)
    constant = params["log_priors"] + params["log_normalisers"]
    if all(np.array_equal(block, blocks[0]) for block in blocks[1:]):
        # tied: ‖z - m_k‖² = ‖z‖² - 2 m_k·z + ‖m_k‖², z = L⁻¹(x - c); ‖z‖² is the same for every class, and
        # m_k·z = (x - c)ᵀ L⁻ᵀ m_k, so the scores are one (d × K) product: w_k = Σ⁻¹(μ_k - c) (Fukunaga 1990, 3.115)
        return {
            "form": np.array(1.0),
            "linear": np.ascontiguousarray(blocks[0].T @ means.T),  # (d, K): column k is L⁻ᵀ m_k
            "offset": constant - 0.5 * (means * means).sum(axis=1),  # ln P(k) + ln c_k - ½‖m_k‖²
        }
    diagonals = np.einsum("kjj->kj", blocks)  # s_k = diag L_k⁻¹ = 1/σ_k
    if np.array_equal(blocks, diagonals[:, :, None] * np.eye(n_features)):
        # diagonal: ‖s_k∘(x - c) - m_k‖² = Σ_j s_kj² x'_j² - 2 s_kj m_kj x'_j + m_kj², x' = x - c
        quadratic = np.concatenate([(diagonals * diagonals).T, (-2.0 * diagonals * means).T])  # (2d, K)
        return {
            "form": np.array(2.0),
            "quadratic": -0.5 * quadratic,
            "offset": constant - 0.5 * (means * means).sum(axis=1),
        }
    return {
        "form": np.array(0.0),
        "augmented": augmented_whitening(params),
        "whitening_t": np.ascontiguousarray(params["whitening"].T),  # (d, K·d), for one row at a time
        "offset": constant,
    }


def evaluate(
    X: object, evidence: str, rule_plan: dict[str, np.ndarray], features: tuple[str, ...], invalid_input: str
) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """Posteriors, risks and validity for raw input; raise InputError on invalid rows under "error"."""
    prepared = feature_matrix(X, features, rule_plan["loss_t"].dtype)
    posteriors, risks, valid, _ = posteriors_and_risks(prepared, evidence, rule_plan)
    if invalid_input == "error" and not valid.all():
        raise InputError(invalid_rows_message(valid, prepared=prepared, features=features))
    return posteriors, risks, valid


def augmented_whitening(params: dict[str, np.ndarray]) -> np.ndarray:
    """[L_1⁻ᵀ … L_K⁻ᵀ; -m_1 … -m_K], shape (d + 1, K·d), so [x - c, 1] times it is z_k = L_k⁻¹(x - c) - m_k for
    every class in one product (m_k = L_k⁻¹(μ_k - c) is folded in as the row for the constant column)."""
    return np.ascontiguousarray(np.vstack([params["whitening"].T, -params["whitened_means"]]))


def squared_distances(
    X: np.ndarray,
    centre: np.ndarray,
    augmented: np.ndarray,
    n_classes: int,
    out: np.ndarray | None = None,
    work: dict[str, np.ndarray] | None = None,
) -> np.ndarray:
    """Squared Mahalanobis distance of every row to every class, shape (n, K), for any covariance structure.

    ‖L_k⁻¹(x - μ_k)‖² with z_k = L_k⁻¹(x - c) - L_k⁻¹(μ_k - c) around a common centre c against cancellation;
    all classes share one product [x - c, 1] (d + 1 × K·d) with :func:`augmented_whitening`. ``work`` (from
    :func:`workspace`) holds reusable buffers for those two operands; without it they are allocated.
    """
    rows = X.shape[0]
    work = work or workspace("gaussian", {"augmented": augmented, "form": np.array(0.0)}, rows)
    centred, whitened = work["centred"][:rows], work["whitened"][:rows]
    np.subtract(X, centre, out=centred[:, :-1])
    np.matmul(centred, augmented, out=whitened)
    stacked = whitened.reshape(rows, n_classes, -1)
    return np.einsum("nkd,nkd->nk", stacked, stacked, out=out)


def workspace(evidence: str, rule_plan: dict[str, np.ndarray], rows: int) -> dict[str, np.ndarray]:
    """Buffers one thread reuses chunk after chunk (allocating megabytes per chunk costs page faults)."""
    if evidence != "gaussian" or rule_plan["form"] != 0.0:
        return {}
    augmented = rule_plan["augmented"]
    centred = np.empty((rows, augmented.shape[0]), dtype=augmented.dtype)
    centred[:, -1] = 1.0  # the constant column of [x - c, 1]
    return {"centred": centred, "whitened": np.empty((rows, augmented.shape[1]), dtype=augmented.dtype)}


def gaussian_log_likelihoods(X: np.ndarray, params: dict[str, np.ndarray]) -> tuple[np.ndarray, np.ndarray]:
    """ln N(x; μ_k, Σ_k) for every class, and which rows hold only finite values.

    ln N(x; μ_k, Σ_k) = -½‖L_k⁻¹(x - μ_k)‖² - Σ_i ln (L_k)_ii - (d/2) ln 2π  (Σ_k = L_k L_kᵀ);
    log_normalisers holds the last two terms.
    """
    with np.errstate(invalid="ignore", over="ignore"):
        squared = squared_distances(X, params["centre"], augmented_whitening(params), params["log_normalisers"].size)
        log_likelihoods = params["log_normalisers"] - 0.5 * squared
    return log_likelihoods, np.isfinite(X).all(axis=1)


def gaussian_scores(
    X: np.ndarray, rule_plan: dict[str, np.ndarray], out: np.ndarray, work: dict[str, np.ndarray]
) -> np.ndarray:
    """ln P(k) + ln N(x; μ_k, Σ_k) for every class into ``out`` (n, K), up to a per-row constant.

    Full covariance: -½ :func:`squared_distances` plus ln P(k) and the normalisers. Tied: the common
    -½‖L⁻¹(x - c)‖² cancels in the posteriors, leaving m_k·L⁻¹(x - c), linear in x (one d × K product:
    Fukunaga 1990, eq. 3.115 for the linear form). Diagonal: [x'², x'] with x' = x - c,
    one (2d × K) product. A row holding NaN or ±inf gives a non-finite best score (every class's block
    has a non-zero diagonal), which :func:`_chunk` marks invalid; so does a finite row far enough out
    that every score overflows.
    """
    form = rule_plan["form"]
    if form == 1.0:
        np.matmul(X - rule_plan["centre"], rule_plan["linear"], out=out)
    elif form == 2.0:
        centred = X - rule_plan["centre"]
        np.matmul(np.concatenate([centred * centred, centred], axis=1), rule_plan["quadratic"], out=out)
    else:
        squared_distances(X, rule_plan["centre"], rule_plan["augmented"], out.shape[1], out, work)
        out *= -0.5
    out += rule_plan["offset"]
    return out


def posterior_scores(
    X: np.ndarray, rule_plan: dict[str, np.ndarray], out: np.ndarray, work: dict[str, np.ndarray]
) -> np.ndarray:
    """Upstream posteriors as ln P̃(k) + ln p(x|k) up to a per-row constant, into ``out``; invalid rows NaN.

    p(x|k) ∝ p(k|x) / π_k with π the priors the upstream model was trained under, so
    ln p(k|x) - ln π_k + ln π̃_k gives the posterior under new priors π̃ after normalising
    (Saerens, Latinne & Decaestecker 2002, Neural Computation 14(1), eq. for known new priors).
    """
    sums = X.sum(axis=1)
    finite = np.isfinite(X).all(axis=1)
    in_range = ((X >= 0.0) & (X <= 1.0)).all(axis=1)
    if rule_plan["renormalise"] > 0.0:
        X = X / np.where(sums > 0.0, sums, 1.0)[:, None]
        valid = finite & (X >= 0.0).all(axis=1) & (sums > 0.0)
    else:
        valid = finite & in_range & (np.abs(sums - 1.0) <= rule_plan["sum_tolerance"])
    with np.errstate(divide="ignore", invalid="ignore"):
        out[:] = calibrated_log_probabilities(X, rule_plan)
    out += rule_plan["log_priors"] - rule_plan["log_trained_priors"]
    out[~valid] = np.nan
    return out


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


def supplied_scores(
    X: np.ndarray, rule_plan: dict[str, np.ndarray], out: np.ndarray, work: dict[str, np.ndarray]
) -> np.ndarray:
    """Per-class ln p(x|k) computed elsewhere, plus ln P(k); +inf and NaN are invalid, -inf means impossible."""
    np.add(X, rule_plan["log_priors"], out=out)
    out[np.isposinf(X).any(axis=1)] = np.nan
    return out


SCORES = {
    "gaussian": gaussian_scores,
    "posterior": posterior_scores,
    "log-likelihood": supplied_scores,
}


def posteriors_and_risks(
    X: np.ndarray, evidence: str, rule_plan: dict[str, np.ndarray]
) -> tuple[np.ndarray, np.ndarray, np.ndarray, np.ndarray]:
    """Posteriors (n, K), conditional risks (n, A), a validity mask (n,) and a novelty mask (n,) for prepared
    input.

    Rows that are not valid hold NaN and are never novel. Work proceeds in chunks of CHUNK_ROWS rows, as in
    :func:`decide_rows`, so both give the same decisions to the bit.
    """
    n_rows = X.shape[0]
    posteriors = np.empty((n_rows, rule_plan["log_priors"].shape[0]), dtype=rule_plan["loss_t"].dtype)
    risks = np.empty((n_rows, rule_plan["loss_t"].shape[1]), dtype=rule_plan["loss_t"].dtype)
    valid = np.empty(n_rows, dtype=bool)
    novel = np.empty(n_rows, dtype=bool)
    work = workspace(evidence, rule_plan, min(n_rows, CHUNK_ROWS))
    for start in range(0, n_rows, CHUNK_ROWS):
        rows = slice(start, start + CHUNK_ROWS)
        valid[rows], novel[rows] = _chunk(X[rows], evidence, rule_plan, posteriors[rows], risks[rows], work)
        posteriors[rows][~valid[rows]] = np.nan
        risks[rows][~valid[rows]] = np.nan
    return posteriors, risks, valid, novel


def decide_rows(
    X: np.ndarray, evidence: str, rule_plan: dict[str, np.ndarray], invalid_action: int
) -> tuple[np.ndarray, np.ndarray]:
    """The action index and validity per row of prepared input, each shape (n,): :func:`choose` on
    :func:`posteriors_and_risks`, without keeping n-long posteriors and risks (chunk-sized buffers are reused)."""
    n_rows = X.shape[0]
    posteriors = np.empty((min(n_rows, CHUNK_ROWS), rule_plan["log_priors"].shape[0]), rule_plan["loss_t"].dtype)
    risks = np.empty((posteriors.shape[0], rule_plan["loss_t"].shape[1]), rule_plan["loss_t"].dtype)
    actions = np.empty(n_rows, dtype=np.intp)
    valid = np.empty(n_rows, dtype=bool)
    work = workspace(evidence, rule_plan, min(n_rows, CHUNK_ROWS))
    for start in range(0, n_rows, CHUNK_ROWS):
        rows = slice(start, start + CHUNK_ROWS)
        size = min(CHUNK_ROWS, n_rows - start)
        valid[rows], novel = _chunk(X[rows], evidence, rule_plan, posteriors[:size], risks[:size], work)
        actions[rows] = choose(risks[:size], valid[rows], invalid_action, novel)
    return actions, valid


def novel_rows(
    X: np.ndarray, rule_plan: dict[str, np.ndarray], work: dict[str, np.ndarray] | None = None
) -> np.ndarray:
    """Rows outside the region of every class with a non-zero prior (distance reject, Dubuisson & Masson 1993).

    The row is novel when D²_k(x) = ‖L_k⁻¹(x - μ_k)‖² > novelty_threshold = χ²_d⁻¹(coverage) for every such k
    (:func:`squared_distances`, reusing the ``work`` buffers if given). All False when the rule has no threshold.
    """
    if "novelty_threshold" not in rule_plan:
        return np.zeros(X.shape[0], dtype=bool)
    classes = rule_plan["novelty_classes"]
    with np.errstate(invalid="ignore", over="ignore"):
        squared = squared_distances(X, rule_plan["centre"], rule_plan["augmented"], classes.size, work=work or None)
        return np.asarray((squared[:, classes] > rule_plan["novelty_threshold"]).all(axis=1))


def _chunk(
    X: np.ndarray,
    evidence: str,
    rule_plan: dict[str, np.ndarray],
    posteriors: np.ndarray,
    risks: np.ndarray,
    work: dict[str, np.ndarray],
) -> tuple[np.ndarray, np.ndarray]:
    """Posteriors and risks of one chunk into the given buffers; returns which rows are valid, and which valid
    rows are novel.

    A valid row's posteriors are finite; an invalid row's buffers hold arbitrary values.
    """
    dtype = rule_plan["loss_t"].dtype
    X = X.astype(dtype, copy=False)
    with np.errstate(invalid="ignore", over="ignore", divide="ignore"):
        scores = SCORES[evidence](X, rule_plan, posteriors, work)
        # P(k|x) = exp(s_k - max_j s_j) / Σ_i exp(s_i - max_j s_j): the row max first, pairwise over columns
        top = scores[:, 0].copy()
        for k in range(1, scores.shape[1]):
            np.maximum(top, scores[:, k], out=top)  # NaN propagates, so a NaN score marks the row invalid
        valid = np.isfinite(top)
        scores -= top[:, None]
        np.exp(scores, out=scores)
        scores /= (scores @ rule_plan["class_ones"])[:, None]  # Σ_i as a product: far faster than sum(axis=1) here
    # R(a|x) = Σ_k λ(a|k) P(k|x)   (Duda, Hart & Stork 2001, §2.2; Fukunaga 1990, eq. 3.19)
    np.matmul(scores, rule_plan["loss_t"], out=risks)
    # a constant row (the reject option) has risk exactly d, not d·ΣP(k|x) with ΣP = 1 ± ε
    constant = rule_plan["constant_rows"]
    if constant.any():
        risks[:, constant] = rule_plan["constant_costs"]
    return valid, novel_rows(X, rule_plan, work) & valid


def decide_matrix(
    X: np.ndarray, evidence: str, rule_plan: dict[str, np.ndarray], invalid_action: int
) -> tuple[np.ndarray, np.ndarray]:
    """Actions and validity for prepared input: :func:`decide_row` for one row, else :func:`decide_rows`."""
    if X.shape[0] == 1:
        action, valid = decide_row(X[0], evidence, rule_plan, invalid_action)
        return np.array([action]), np.array([valid])
    return decide_rows(X, evidence, rule_plan, invalid_action)


def decide_row(x: np.ndarray, evidence: str, rule_plan: dict[str, np.ndarray], invalid_action: int) -> tuple[int, bool]:
    """The action index for one prepared row ``x`` of shape (d,), and whether the row was valid.

    The same formulas as :func:`_chunk` on 1-D arrays, with no chunk machinery, for services that decide one
    request at a time. Decisions equal the batch path's except where the two smallest risks are within a few
    ulps of each other (a one-row product may sum in another order than a many-row one).
    """
    with np.errstate(invalid="ignore", over="ignore", divide="ignore"):
        if evidence == "gaussian" and rule_plan["form"].item() == 0.0:  # item(): a Python compare, not numpy's
            z = (x - rule_plan["centre"]) @ rule_plan["whitening_t"]
            z -= rule_plan["whitened_means"]
            z *= z
            # -½‖z_k‖² per class, summed within each class's block: a product with a block matrix would add
            # 0·inf = NaN to every class when one class's distance overflows, where the batch path drops that class
            scores = z.reshape(rule_plan["offset"].shape[0], -1).sum(axis=1)
            scores *= -0.5
            scores += rule_plan["offset"]
        else:
            scores = SCORES[evidence](x[None, :], rule_plan, np.empty((1, rule_plan["loss_t"].shape[0])), {})[0]
        top = scores.max()  # NaN propagates (a NaN score of one class makes the row invalid, as in _chunk)
        if not math.isfinite(top):  # NaN or ±inf: the row is invalid (see gaussian_scores)
            return invalid_action, False
        if "novelty_threshold" in rule_plan and novel_rows(x[None, :], rule_plan)[0]:
            return invalid_action, True  # the reject action, for novelty
        # R(a|x) = Σ_k λ(a|k) P(k|x) with P(k|x) = exp(s_k - max_j s_j) / Σ_i exp(s_i - max_j s_j): one product
        # with [λᵀ, 1] gives every unnormalised risk and the normaliser
        scores -= top
        np.exp(scores, out=scores)
        unnormalised = (scores @ rule_plan["loss_t_sum"]).tolist()
    normaliser = unnormalised.pop()
    # R(a|x) = unnormalised_a / Σ + shift_a: a constant row's risk is exactly its cost, the others' shift is 0.0;
    # Python's arithmetic on a few values beats numpy calls
    shifts = rule_plan["constant_shift"].tolist()
    risks = [risk / normaliser + shift for risk, shift in zip(unnormalised, shifts, strict=True)]
    return risks.index(min(risks)), True  # the first minimum: ties go to the earlier action


def choose(risks: np.ndarray, valid: np.ndarray, reject_action: int, novel: np.ndarray) -> np.ndarray:
    """Index of the minimum-risk action per row; ties go to the earlier action.

    With the reject row last, argmin takes an action whenever min_a R(a|x) <= d and
    rejects when min_a R(a|x) > d (Chow 1970). Invalid and novel rows get ``reject_action``.
    """
    # an invalid row's risks are never read
    return np.where(valid & ~novel, np.argmin(risks, axis=1), reject_action)


def reasons(valid: np.ndarray, novel: np.ndarray) -> np.ndarray:
    """The reason for each row's action (an entry of REASONS), shape (n,)."""
    return np.asarray(REASONS)[np.where(valid, np.where(novel, 1, 0), 2)]


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
    numbering = "0-based" if first_row == 0 else "1-based"  # a batch of a file starts at its own row number
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
