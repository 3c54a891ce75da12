"""The kernel's fast paths against the full computation and an outside reference.

The decide-only path (chunk buffers, no n-long posteriors), the one-row path and the tied and diagonal forms of
the Gaussian scores are rewritten arithmetic: each must give the decisions of the full computation, and the
posteriors must match scipy's log-densities through a softmax. Then the kernel at its edges: the exact reject
risk, ties, the posterior-row checks, one-action rules and the invalid-rows message.
"""

from __future__ import annotations

import threading
import tracemalloc
from typing import Any

import numpy as np
import pytest
import scipy.special
from helpers import (
    gaussian_rule,
    loglik_evidence,
    policy_text,
    posterior_evidence,
    random_covariances,
    random_spd,
    rule_from_text,
)
from hypothesis import given, settings
from hypothesis import strategies as st
from scipy.stats import multivariate_normal

from policyc.runtime import ArtefactError, InputError, Rule, kernel
from policyc.runtime.rule import PARALLEL_MIN_ROWS

FORMS = {"full": 0.0, "tied": 1.0, "diagonal": 2.0}


def random_rule(seed: int, covariance: str, n_classes: int = 4, dim: int = 5, reject: bool = True) -> Rule:
    rng = np.random.default_rng(seed)
    means = rng.normal(scale=2.0, size=(n_classes, dim))
    covariances = random_covariances(rng, n_classes, dim, covariance)
    loss = rng.uniform(0.0, 10.0, size=(n_classes + 1, n_classes))
    np.fill_diagonal(loss, 0.0)
    priors = rng.dirichlet(np.ones(n_classes))
    return gaussian_rule(means, covariances, priors, loss, reject_cost=1.5 if reject else None, covariance=covariance)


def sample(rule: Rule, seed: int, rows: int) -> np.ndarray:
    rng = np.random.default_rng(seed)
    X = rng.normal(scale=4.0, size=(rows, len(rule.features)))
    X[::97, 0] = np.nan  # some invalid rows among the valid ones
    X[::89, -1] = np.inf
    return X


@pytest.mark.parametrize("covariance", FORMS)
def test_the_covariance_structure_is_read_from_the_arrays(covariance: str) -> None:
    assert random_rule(0, covariance)._plan["form"] == FORMS[covariance]


@pytest.mark.parametrize("covariance", FORMS)
def test_posteriors_match_scipy_log_densities_through_a_softmax(covariance: str) -> None:
    # P(k|x) = softmax_k(ln P(k) + ln N(x; μ_k, Σ_k)) with scipy.stats.multivariate_normal.logpdf
    # (references.md MV-1, MV-3) and scipy.special.softmax; the tied form drops -½‖L⁻¹(x - c)‖², which
    # cancels in the softmax, so only the posteriors, not the scores, can be compared.
    rule = random_rule(3, covariance)
    params = rule.params
    n_classes = len(rule.classes)
    whitening = params["whitening"].reshape(n_classes, len(rule.features), -1)
    means = params["centre"] + np.array(
        [np.linalg.solve(whitening[k], params["whitened_means"].reshape(n_classes, -1)[k]) for k in range(n_classes)]
    )
    covariances = [np.linalg.inv(whitening[k].T @ whitening[k]) for k in range(n_classes)]
    X = np.random.default_rng(4).normal(scale=3.0, size=(500, len(rule.features)))
    joint = np.column_stack(
        [multivariate_normal(means[k], covariances[k]).logpdf(X) for k in range(n_classes)]
    ) + np.asarray(params["log_priors"])
    np.testing.assert_allclose(rule.posteriors(X), scipy.special.softmax(joint, axis=1), rtol=1e-9, atol=1e-14)


@pytest.mark.parametrize("shared", [(0, 0, 1), (0, 1, 1), (0, 1, 0)])
def test_a_covariance_shared_by_some_classes_only_is_not_tied(shared: tuple[int, int, int]) -> None:
    # only a covariance common to every class cancels from the scores (Fukunaga 1990, eq. 3.115): with two
    # classes sharing one and the third apart, the posteriors are still scipy's log-densities through a softmax
    # (references.md MV-1, MV-3)
    rng = np.random.default_rng(37)
    distinct = [random_spd(rng, 3), random_spd(rng, 3)]
    covariances = np.array([distinct[i] for i in shared])
    means = rng.normal(scale=2.0, size=(3, 3))
    priors = np.array([0.2, 0.3, 0.5])
    rule = gaussian_rule(means, covariances, priors, 1.0 - np.eye(3))
    X = rng.normal(scale=3.0, size=(200, 3))
    joint = np.column_stack([multivariate_normal(means[k], covariances[k]).logpdf(X) for k in range(3)])
    expected = scipy.special.softmax(joint + np.log(priors), axis=1)
    np.testing.assert_allclose(rule.posteriors(X), expected, rtol=1e-9, atol=1e-14)


@settings(max_examples=30, deadline=None)
@given(seed=st.integers(0, 2**31), covariance=st.sampled_from(list(FORMS)), rows=st.integers(2, 9000))
def test_decide_gives_exactly_the_decisions_of_the_full_computation(seed: int, covariance: str, rows: int) -> None:
    # decide keeps no n-long posteriors or risks; choose() on posteriors_and_risks is the full computation.
    rule = random_rule(seed % 1000, covariance)
    X = sample(rule, seed, rows)
    posteriors, risks, valid, novel = kernel.posteriors_and_risks(X, rule.evidence, rule._plan)
    np.testing.assert_array_equal(rule.decide(X), kernel.choose(risks, valid, len(rule.actions) - 1, novel))
    assert np.isnan(posteriors[~valid]).all() and np.isfinite(posteriors[valid]).all()


@pytest.mark.parametrize("covariance", FORMS)
def test_one_row_at_a_time_decides_as_the_batch_except_at_ulp_ties(covariance: str) -> None:
    rule = random_rule(7, covariance)
    X = sample(rule, 8, 3000)
    batch = rule.explain(X)
    one_by_one = np.array([rule.decide(row[None, :])[0] for row in X])
    records = [dict(zip(rule.features, row.tolist(), strict=True)) for row in X[batch.valid][:300]]
    by_record = np.array([rule.actions.index(rule.decide_one(record)) for record in records])
    # a one-row product may round differently: the decisions may differ only where the two best risks tie
    # to within a few ulps of the risks' scale
    scale = np.abs(rule.params["loss"]).max()
    near_tie = np.where(batch.valid, batch.margin, np.inf) <= 64 * np.finfo(float).eps * scale
    assert ((one_by_one != batch.action) & ~near_tie).sum() == 0
    assert ((by_record != batch.action[batch.valid][:300]) & ~near_tie[batch.valid][:300]).sum() == 0
    assert (one_by_one[~batch.valid] == len(rule.actions) - 1).all()


def test_one_row_with_a_nan_log_likelihood_in_any_class_is_invalid() -> None:
    # the one-row path must see a NaN in any column, not only in the first (Python's max() would not)
    classes = ["a", "b", "c"]
    text = policy_text(
        classes=classes,
        priors=[1 / 3] * 3,
        actions=["say_a", "say_b", "say_c"],
        loss=1.0 - np.eye(3),
        evidence=loglik_evidence(classes),
        reject_cost=0.3,
        invalid_input="reject",
    )
    rule = rule_from_text(text)
    for column in range(3):
        row = np.zeros((1, 3))
        row[0, column] = np.nan
        assert rule.decide(row)[0] == len(rule.actions) - 1
        assert not rule.explain(row).valid[0]


@pytest.mark.parametrize("covariance", FORMS)
def test_far_rows_never_give_nan_posteriors(covariance: str) -> None:
    # references.md MV-3: 50σ from every mean the linear-space softmax underflows; the log domain must not
    rule = random_rule(11, covariance)
    X = np.full((4, len(rule.features)), 50.0) * np.array([[1.0], [-1.0], [1e3], [-1e3]])
    explanation = rule.explain(X)
    assert explanation.valid.all()
    assert np.isfinite(explanation.posteriors).all()
    np.testing.assert_allclose(explanation.posteriors.sum(axis=1), 1.0, rtol=1e-12)


@pytest.mark.parametrize("threads", [2, 3])
def test_threads_split_whole_chunks_and_give_the_same_bits(threads: int) -> None:
    rule = random_rule(13, "full")
    X = sample(rule, 14, PARALLEL_MIN_ROWS + 3 * kernel.CHUNK_ROWS + 17)  # the pool starts at PARALLEL_MIN_ROWS
    np.testing.assert_array_equal(rule.decide(X, threads=threads), rule.decide(X, threads=1))


def blocks_by_thread(monkeypatch: pytest.MonkeyPatch, fail_off_the_main_thread: bool = False) -> list[tuple[bool, int]]:
    """Record (on the calling thread?, rows) of every block the thread pool hands to kernel.decide_rows."""
    calls: list[tuple[bool, int]] = []
    decide_rows = kernel.decide_rows

    def recording(X: np.ndarray, *args: Any) -> tuple[np.ndarray, np.ndarray]:
        on_main = threading.current_thread() is threading.main_thread()
        calls.append((on_main, X.shape[0]))
        if fail_off_the_main_thread and not on_main:
            raise MemoryError("a worker ran out of memory")
        return decide_rows(X, *args)

    monkeypatch.setattr(kernel, "decide_rows", recording)
    return calls


@pytest.mark.parametrize("threads", [2, 3])
def test_each_thread_takes_one_block_of_whole_chunks(threads: int, monkeypatch: pytest.MonkeyPatch) -> None:
    rule = random_rule(13, "full")
    rows = PARALLEL_MIN_ROWS + 3 * kernel.CHUNK_ROWS + 17
    calls = blocks_by_thread(monkeypatch)
    rule.decide(sample(rule, 14, rows), threads=threads)
    assert len(calls) == threads and sum(on_main for on_main, _ in calls) == 1
    assert sum(size for _, size in calls) == rows
    assert sorted(size % kernel.CHUNK_ROWS for _, size in calls)[:-1] == [0] * (threads - 1)


def test_a_batch_below_the_parallel_minimum_stays_on_the_calling_thread(monkeypatch: pytest.MonkeyPatch) -> None:
    # PARALLEL_MIN_ROWS: "smaller batches run on the calling thread"; from it on, the threads share the batch
    rule = random_rule(13, "full")
    X = sample(rule, 15, PARALLEL_MIN_ROWS)
    blocks_by_thread(monkeypatch, fail_off_the_main_thread=True)
    for threads in (1, 2, 3):
        rule.decide(X[:-1], threads=threads)
    rule.decide(X, threads=1)
    # and a failure on a worker thread is raised on the calling thread
    with pytest.raises(MemoryError, match="a worker ran out of memory"):
        rule.decide(X, threads=2)


def peak_bytes(function: Any, X: np.ndarray) -> int:
    """The largest amount of memory traced while ``function(X)`` ran (numpy reports its arrays to tracemalloc)."""
    tracemalloc.start()
    try:
        function(X)
        return tracemalloc.get_traced_memory()[1]
    finally:
        tracemalloc.stop()


def test_beyond_one_chunk_memory_grows_with_the_batch_by_the_outputs_only() -> None:
    # CHUNK_ROWS bounds the work arrays whatever the input size: from 8 to 32 chunks of rows, decide's peak grows
    # by the action and validity of each extra row (9 bytes), and posteriors' by the posteriors, risks, validity
    # and novelty of each (74 bytes here); the full form's (rows, K·d) work array alone would be 160 bytes a row
    rule = random_rule(41, "full", n_classes=4, dim=5)
    small, large = (sample(rule, 42, chunks * kernel.CHUNK_ROWS) for chunks in (8, 32))
    extra_rows = large.shape[0] - small.shape[0]
    outputs = (len(rule.classes) + len(rule.actions)) * 8 + 2
    assert peak_bytes(rule.decide, large) - peak_bytes(rule.decide, small) <= extra_rows * (9 + 8)
    assert peak_bytes(rule.posteriors, large) - peak_bytes(rule.posteriors, small) <= extra_rows * (outputs + 16)


def test_threads_must_be_positive() -> None:
    rule = random_rule(13, "full")
    with pytest.raises(InputError, match="threads must be a positive number"):
        rule.decide(np.zeros((3, len(rule.features))), threads=0)


@pytest.mark.parametrize("covariance", FORMS)
def test_float32_agrees_with_float64_to_its_precision(covariance: str) -> None:
    rule = random_rule(17, covariance)
    single = rule.astype(np.float32)
    X = sample(rule, 18, 4000)
    explanation = rule.explain(X)
    posteriors = single.posteriors(X)
    assert single.dtype == np.float32 and posteriors.dtype == np.float32
    valid = explanation.valid
    np.testing.assert_allclose(posteriors[valid], explanation.posteriors[valid], atol=1e-5)
    assert np.isnan(posteriors[~valid]).all()
    # decisions differ only where the float64 risks of the two best actions are within float32 rounding
    near_tie = np.where(valid, explanation.margin, np.inf) <= 1e-5 * np.abs(rule.params["loss"]).max()
    assert ((single.decide(X) != explanation.action) & ~near_tie).sum() == 0


@pytest.mark.parametrize("covariance", FORMS)
def test_float32_input_to_a_float32_rule_is_not_widened_and_decides_as_widened(covariance: str) -> None:
    # Law: widening float32 values to float64 and narrowing them back is exact, so a float32 rule must give
    # the same bits whether it receives the float32 values or their float64 widening.
    single = random_rule(19, covariance).astype(np.float32)
    X = sample(single, 20, 3 * kernel.CHUNK_ROWS + 5).astype(np.float32)
    X[7, 2] = np.nan  # an invalid row stays invalid on both paths
    assert kernel.feature_matrix(X, single.features, np.float32) is X  # C-ordered float32: used as it is
    np.testing.assert_array_equal(single.decide(X), single.decide(X.astype(np.float64)))
    np.testing.assert_array_equal(single.posteriors(X), single.posteriors(X.astype(np.float64)))


@pytest.mark.parametrize(
    ("rule_dtype", "given", "kept"),
    [(np.float32, np.float32, np.float32), (np.float32, np.float64, np.float64), (np.float64, np.float32, np.float64)],
)
def test_input_is_float64_unless_a_float32_rule_receives_float32(rule_dtype: type, given: type, kept: type) -> None:
    columns = {"a": np.arange(3, dtype=given), "b": np.ones(3, dtype=given)}
    assert kernel.feature_matrix(columns, ("a", "b"), rule_dtype).dtype == kept
    assert kernel.feature_matrix(np.column_stack(list(columns.values())), ("a", "b"), rule_dtype).dtype == kept
    assert kernel.feature_matrix(np.arange(4).reshape(2, 2), ("a", "b"), rule_dtype).dtype == np.float64  # integers


@pytest.mark.parametrize("dtype", ["float16", "int64", np.complex128, "no-such-type", None])
def test_only_float32_and_float64_kernels_exist(dtype: object) -> None:
    with pytest.raises(InputError, match="dtype must be float32 or float64"):
        random_rule(13, "full").astype(dtype)  # type: ignore[arg-type]


# --- the kernel at its edges ------------------------------------------------------------------------

ZERO_ONE_3 = 1.0 - np.eye(3)


def loglik_rule(loss: np.ndarray, reject_cost: float | None, priors=(0.2, 0.3, 0.5)) -> Rule:
    classes = [f"c{k}" for k in range(loss.shape[1])]
    text = policy_text(
        classes=classes,
        priors=priors,
        actions=[f"a{a}" for a in range(loss.shape[0])],
        loss=loss,
        evidence=loglik_evidence(classes),
        reject_cost=reject_cost,
        invalid_input="reject" if reject_cost is not None else "error",
    )
    return rule_from_text(text)


def test_the_reject_risk_is_exactly_the_reject_cost() -> None:
    # R(reject|x) = d Σ_k P(k|x) = d; computed as the product it would be d(1 ± ε) wherever ΣP rounds away from 1,
    # which moves act/reject decisions at a tie.
    rule = loglik_rule(ZERO_ONE_3, 0.1)
    X = np.random.default_rng(0).normal(scale=3.0, size=(2000, 3))
    risks = rule.risks(X)
    sums = rule.posteriors(X).sum(axis=1)
    assert np.any(sums != 1.0)  # the case the exact value guards against does occur
    assert np.all(risks[:, -1] == 0.1)
    # the plain actions keep R(a|x) = Σ_k λ(a|k) P(k|x) (Duda, Hart & Stork 2001, §2.2; references.md LR-1)
    np.testing.assert_allclose(risks[:, :3], rule.posteriors(X) @ ZERO_ONE_3.T, rtol=1e-15)


def test_a_constant_action_row_also_has_its_constant_risk() -> None:
    loss = np.array([[0.0, 1.0, 1.0], [0.3, 0.3, 0.3], [1.0, 1.0, 0.0]])
    rule = loglik_rule(loss, None)
    X = np.random.default_rng(1).normal(scale=3.0, size=(500, 3))
    assert np.all(rule.risks(X)[:, 1] == 0.3)


def test_an_exact_tie_between_an_action_and_the_reject_cost_goes_to_the_action() -> None:
    # Chow 1970 (references.md CH-1): accept iff max posterior >= 1 - t; at equality the action is taken.
    # Posteriors (0.75, 0.25) are exact in binary; log-likelihoods ln 0.75, ln 0.25 under equal priors give them.
    loss = np.array([[0.0, 1.0], [1.0, 0.0]])
    rule = loglik_rule(loss, 0.25, priors=(0.5, 0.5))
    X = np.log(np.array([[0.75, 0.25], [0.25, 0.75], [0.7, 0.3]]))
    risks = rule.risks(X)
    tied = risks[:, :2].min(axis=1) == 0.25
    assert tied[:2].all()  # these two rows tie exactly
    assert rule.decide_names(X).tolist() == ["a0", "a1", "reject"]


def posterior_rule(sum_tolerance: float) -> Rule:
    classes = ["c0", "c1"]
    evidence = posterior_evidence(classes, [0.5, 0.5]) | {"sum_tolerance": sum_tolerance}
    text = policy_text(
        classes=classes,
        priors=[0.5, 0.5],
        actions=["a0", "a1"],
        loss=np.array([[0.0, 1.0], [1.0, 0.0]]),
        evidence=evidence,
        reject_cost=0.4,
        invalid_input="reject",
    )
    return rule_from_text(text)


def test_posterior_rows_must_lie_in_zero_one_even_when_they_sum_to_one() -> None:
    rule = posterior_rule(1e-6)
    X = np.array([[1.0 + 5e-7, 0.0], [-5e-7, 1.0], [0.4, 0.6], [1.0, 0.0]])
    assert rule.explain(X).valid.tolist() == [False, False, True, True]


def test_the_sum_tolerance_is_inclusive() -> None:
    # |Σp - 1| <= sum_tolerance is valid; 2^-10 and its multiples are exact in binary, so the boundary is exact.
    rule = posterior_rule(2.0**-10)
    X = np.array([[0.5, 0.5 - 2.0**-10], [0.5, 0.5 + 2.0**-10], [0.5, 0.5 - 2.0**-9], [0.5, 0.5 + 2.0**-9]])
    assert rule.explain(X).valid.tolist() == [True, True, False, False]


@pytest.mark.parametrize("kind", ["posterior", "log-likelihood"])
def test_supplied_evidence_needs_one_column_per_class(kind: str) -> None:
    rule = posterior_rule(1e-6) if kind == "posterior" else loglik_rule(ZERO_ONE_3, 0.4)
    manifest = dict(rule.manifest) | {"features": list(rule.features)[:-1]}
    with pytest.raises(ArtefactError, match="'features' must name one column per class"):
        Rule(manifest, dict(rule.params))


def test_explain_on_a_one_action_rule_has_no_runner_up() -> None:
    rule = loglik_rule(np.array([[1.0, 2.0, 3.0]]), None)
    explained = rule.explain(np.zeros((2, 3)))
    assert explained.action.tolist() == [0, 0] and explained.action_name.tolist() == ["a0", "a0"]
    assert explained.runner_up.tolist() == [-1, -1] and explained.runner_up_name.tolist() == [None, None]
    assert np.isnan(explained.margin).all()


def test_explain_margin_is_the_runner_up_risk_minus_the_chosen_risk() -> None:
    rule = loglik_rule(ZERO_ONE_3, 0.5)
    X = np.log(np.array([[0.6, 0.3, 0.1], [0.2, 0.2, 0.6], [np.nan, 0.3, 0.5]]) / (0.2, 0.3, 0.5))
    explained = rule.explain(X)
    # P = (0.6, 0.3, 0.1): R = (0.4, 0.7, 0.9, reject 0.5): a0 chosen, the reject option runner-up, margin 0.1;
    # P = (0.2, 0.2, 0.6): R = (0.8, 0.8, 0.4, 0.5): a2 chosen, again the reject option at 0.1 (hand-computed)
    assert explained.action.tolist()[:2] == [0, 2] and explained.runner_up.tolist() == [3, 3, -1]
    np.testing.assert_allclose(explained.margin[:2], [0.1, 0.1], atol=1e-12)
    assert np.isnan(explained.margin[2]) and explained.runner_up_name[2] is None


def test_invalid_rows_message_shows_ten_rows_then_counts_the_rest() -> None:
    valid = np.ones(20, dtype=bool)
    valid[[1, 3, 4, 5, 6, 7, 8, 9, 10, 11, 12, 15]] = False
    message = kernel.invalid_rows_message(valid)
    assert "row(s) 1, 3, 4, 5, 6, 7, 8, 9, 10, 11 and 2 more (0-based)" in message
    assert "row(s) 3, 5, 6, 7, 8, 9, 10, 11, 12, 13 and 2 more (1-based)" in kernel.invalid_rows_message(valid, 2)
    exactly_ten = valid.copy()
    exactly_ten[[12, 15]] = True
    assert "11 (0-based)" in kernel.invalid_rows_message(exactly_ten)


def test_invalid_rows_message_names_the_columns_of_each_row() -> None:
    prepared = np.array([[0.0, 1.0], [np.nan, 1.0], [np.inf, -np.inf]])
    valid = np.array([True, False, False])
    message = kernel.invalid_rows_message(valid, prepared=prepared, features=("x", "y"))
    assert message.endswith("(row 1: 'x'; row 2: 'x', 'y')")


def test_invalid_input_error_names_rows_and_columns() -> None:
    rule = loglik_rule(ZERO_ONE_3, None)
    with pytest.raises(InputError, match=r"row\(s\) 1 \(0-based\).*\(row 1: 'll_c1'\)"):
        rule.decide(np.array([[0.0, 0.0, 0.0], [0.0, np.nan, 0.0]]))


@pytest.mark.parametrize("value", [5.1e154, -3e154, 1e160, 1e300])
def test_one_row_far_enough_to_overflow_some_classes_decides_as_the_batch(value: float) -> None:
    # |z_k| beyond ~1.3e154 overflows ‖z_k‖² to inf for some classes only: those classes get probability 0 in
    # both paths (a one-row product with a block matrix would have made every score NaN, and the row invalid)
    rule = random_rule(19, "full")
    row = np.zeros((1, len(rule.features)))
    row[0, 0] = value
    batch = rule.explain(np.vstack([row, row]))
    assert rule.decide(row)[0] == batch.action[0]
    assert rule.explain(row).valid[0] == batch.valid[0]


# --- what the batch path shares with its callers ------------------------------------------------------


@pytest.mark.parametrize("covariance", FORMS)
def test_gaussian_log_likelihoods_are_scipy_log_densities_and_non_finite_rows_are_invalid(covariance: str) -> None:
    # ln N(x; μ_k, Σ_k) = scipy.stats.multivariate_normal.logpdf (references.md MV-1)
    rng = np.random.default_rng(23)
    means = rng.normal(scale=2.0, size=(3, 4))
    covariances = random_covariances(rng, 3, 4, covariance)
    rule = gaussian_rule(means, covariances, [0.2, 0.3, 0.5], 1.0 - np.eye(3), covariance=covariance)
    X = rng.normal(scale=3.0, size=(50, 4))
    X[3, 1], X[7, 2] = np.nan, -np.inf
    log_likelihoods, valid = kernel.gaussian_log_likelihoods(X, dict(rule.params))
    assert np.flatnonzero(~valid).tolist() == [3, 7]
    expected = np.column_stack([multivariate_normal(means[k], covariances[k]).logpdf(X[valid]) for k in range(3)])
    np.testing.assert_allclose(log_likelihoods[valid], expected, rtol=1e-10)


def novelty_rule(threshold: float, priors: tuple[float, float] = (0.5, 0.5)) -> Rule:
    """Two unit-variance classes at 0 and 10 on one feature, with the novelty threshold set to ``threshold``."""
    rule = gaussian_rule(
        np.array([[0.0], [10.0]]), np.ones((2, 1, 1)), priors, 1.0 - np.eye(2), reject_cost=0.4, novelty_coverage=0.9
    )
    return Rule(rule.manifest, dict(rule.params) | {"novelty_threshold": np.array(threshold)})


def test_a_row_exactly_at_the_novelty_threshold_is_inside_the_region() -> None:
    # the region is D² ≤ χ²_d⁻¹(q), the complement of P(D² > χ²_d⁻¹(q)) = 1 - q (references.md NOV-2): a row
    # with D² equal to the threshold is not novel. At x = -2 and 12, D² = 4 exactly (the centre 5 and the
    # means are small integers), against 144 for the other class.
    rule = novelty_rule(4.0)
    X = np.array([[-2.0], [12.0], [-2.5], [12.5]])
    explanation = rule.explain(X)
    assert explanation.reason.tolist() == ["min-risk", "min-risk", "novelty", "novelty"]
    assert rule.decide_names(X).tolist() == ["a0", "a1", "reject", "reject"]
    # a novelty-deferred row's runner-up is the action of minimum risk, and it has no margin (Explanation)
    assert explanation.runner_up_name[2:].tolist() == ["a0", "a1"] and np.isnan(explanation.margin[2:]).all()
    assert np.isfinite(explanation.margin[:2]).all()
    assert [rule.decide_one({"x0": x}) for x in X[:, 0].tolist()] == ["a0", "a1", "reject", "reject"]


def test_a_novel_row_is_valid_input_under_invalid_input_error() -> None:
    # novelty is a decision (the reject action, reason novelty), not invalid input: a strict rule does not raise
    rule = gaussian_rule(
        np.array([[0.0], [10.0]]), np.ones((2, 1, 1)), [0.5, 0.5], 1.0 - np.eye(2), 0.4, "error", novelty_coverage=0.9
    )
    far = np.array([[40.0]])
    assert rule.decide_names(far).tolist() == ["reject"] and rule.decide_one({"x0": 40.0}) == "reject"
    assert rule.decide_names(np.vstack([far, far])).tolist() == ["reject", "reject"]
    assert rule.explain(np.vstack([far, far])).reason.tolist() == ["novelty", "novelty"]


def test_a_class_with_a_zero_prior_has_no_region() -> None:
    # a row inside only the zero-prior class's region is outside every region that counts (NOV-1)
    rule = novelty_rule(4.0, priors=(1.0, 0.0))
    assert rule.explain(np.array([[0.0], [10.0]])).reason.tolist() == ["min-risk", "novelty"]


def test_an_invalid_row_is_never_novel() -> None:
    # posteriors_and_risks: "rows that are not valid hold NaN and are never novel", though +inf is beyond
    # every threshold
    rule = novelty_rule(4.0)
    X = np.array([[np.inf], [-np.inf], [np.nan], [100.0]])
    _, _, valid, novel = kernel.posteriors_and_risks(X, rule.evidence, rule._plan)
    assert valid.tolist() == [False, False, False, True]
    assert novel.tolist() == [False, False, False, True]
    assert rule.explain(X).reason.tolist() == ["invalid", "invalid", "invalid", "novelty"]


def test_one_row_with_an_impossible_class_decides_as_the_batch() -> None:
    # ln p(x|k) = -inf: class k is impossible, the row is valid (only NaN and +inf are invalid input). Priors
    # (0.2, 0.3, 0.5): the first row's P = (2/7, 0, 5/7) has least risk 2/7 > 0.2, so it is rejected (Chow 1970,
    # references.md CH-1); the others leave one possible class (hand-computed).
    rule = loglik_rule(ZERO_ONE_3, 0.2)
    X = np.array([[0.0, -np.inf, 0.0], [-np.inf, -np.inf, 1.0], [-np.inf, 0.0, -np.inf]])
    batch = rule.explain(X)
    assert batch.valid.all()
    assert [rule.decide(row[None, :])[0] for row in X] == batch.action.tolist() == [3, 2, 1]


@pytest.mark.parametrize("covariance", FORMS)
def test_one_row_far_from_every_class_decides_as_the_batch(covariance: str) -> None:
    # 50 to 1000 standard deviations out the joint densities underflow; both paths work in the log domain
    rule = random_rule(29, covariance)
    X = np.random.default_rng(30).normal(size=(40, len(rule.features)))
    X *= np.repeat([50.0, 200.0, 1e3, 1e4], 10)[:, None] / np.linalg.norm(X, axis=1, keepdims=True)
    batch = rule.explain(X)
    assert batch.valid.all()
    assert [rule.decide(row[None, :])[0] for row in X] == batch.action.tolist()


DIRICHLET = {
    "calibration_weights": np.array([[1.5, 0.2, -0.1], [0.3, 0.8, 0.0], [0.0, -0.4, 1.2]]),
    "calibration_bias": np.array([0.1, -0.2, 0.3]),
}


def mapped_posterior_rule(calibration: dict[str, np.ndarray], renormalise: bool = False) -> Rule:
    """Posterior evidence with trained priors (0.5, 0.3, 0.2) and deployment priors (0.2, 0.3, 0.5), through the
    calibration map's arrays (none: no map); ``renormalise`` divides each row by its sum first."""
    rule = loglik_rule(ZERO_ONE_3, 0.3)
    manifest = dict(rule.manifest) | {"evidence": {"kind": "posterior"}}
    params = {
        "log_priors": np.log([0.2, 0.3, 0.5]),
        "loss": np.asarray(rule.params["loss"]),
        "log_trained_priors": np.log([0.5, 0.3, 0.2]),
        "sum_tolerance": np.array(1e-6),
        "renormalise": np.array(float(renormalise)),
    }
    floor = {"calibration_floor": np.array(1e-12)} if calibration else {}
    return Rule(manifest, params | floor | calibration)


def renormalising_rule(renormalise: bool) -> Rule:
    """A Dirichlet map ln q = W ln p + b (Kull et al. 2019), whose output depends on the scale of p."""
    return mapped_posterior_rule(DIRICHLET, renormalise)


def test_renormalise_divides_each_row_by_its_sum() -> None:
    # docs/math.md §5.2: with renormalise, a non-negative row with a positive sum is divided by its sum; so c·p
    # decides as p itself does under the strict rule. The map is not invariant to the scale of p (W 1 is not
    # constant), so skipping the division, or scaling instead of dividing, changes the posteriors.
    strict, renormalising = renormalising_rule(False), renormalising_rule(True)
    p = np.random.default_rng(31).dirichlet(np.ones(3), size=20)
    expected = strict.posteriors(p)
    assert np.isfinite(expected).all()
    for scale in (1e-3, 0.5, 1.0, 7.0):
        np.testing.assert_allclose(renormalising.posteriors(scale * p), expected, rtol=1e-12)
    assert not np.allclose(strict.posteriors(np.clip(2.0 * p, 0.0, 1.0)), expected)  # the map sees the scale


def test_renormalise_accepts_zeros_and_refuses_negative_entries_and_a_zero_sum() -> None:
    # docs/math.md §5.2: valid when the entries are non-negative with a positive sum
    rule = renormalising_rule(True)
    X = np.array([[0.0, 2.0, 6.0], [3.0, 0.0, 0.0], [-1e-9, 0.5, 0.5], [0.0, 0.0, 0.0], [np.nan, 1.0, 1.0]])
    assert rule.explain(X).valid.tolist() == [True, True, False, False, False]
    np.testing.assert_allclose(rule.posteriors(X[:1]), renormalising_rule(False).posteriors(X[:1] / 8.0), rtol=1e-12)


def test_the_prior_shift_divides_by_the_trained_priors() -> None:
    # Saerens, Latinne & Decaestecker 2002 (references.md SA-1): p̃_k ∝ (π̃_k / π_k) p_k; without a map
    p = np.array([[0.6, 0.3, 0.1], [0.2, 0.5, 0.3]])
    shifted = p * np.array([0.2, 0.3, 0.5]) / np.array([0.5, 0.3, 0.2])
    expected = shifted / shifted.sum(axis=1, keepdims=True)
    np.testing.assert_allclose(mapped_posterior_rule({}).posteriors(p), expected, rtol=1e-12)


def test_a_dirichlet_map_is_a_linear_layer_on_log_probabilities() -> None:
    # references.md CAL-2 (Kull et al. 2019): ln q = W ln max(p, ε) + b + const, then the prior shift of SA-1
    p = np.array([[0.6, 0.3, 0.1], [0.2, 0.5, 0.3], [0.0, 0.36, 0.64]])
    scores = np.log(np.maximum(p, 1e-12)) @ DIRICHLET["calibration_weights"].T + DIRICHLET["calibration_bias"]
    expected = scipy.special.softmax(scores + np.log([0.2, 0.3, 0.5]) - np.log([0.5, 0.3, 0.2]), axis=1)
    np.testing.assert_allclose(renormalising_rule(False).posteriors(p), expected, rtol=1e-12)


def test_a_temperature_map_raises_the_probabilities_to_one_over_t() -> None:
    # references.md CAL-1 (Guo et al. 2017): ln q = ln max(p, ε) / T + const, so q ∝ p^(1/T); T = 2 here,
    # then the prior shift of SA-1. A zero probability counts as ε = 1e-12 (docs/math.md §5.2.1).
    rule = mapped_posterior_rule({"calibration_inverse_temperature": np.array(0.5)})
    p = np.array([[0.6, 0.3, 0.1], [0.2, 0.5, 0.3], [0.0, 0.36, 0.64]])
    shifted = np.sqrt(np.maximum(p, 1e-12)) * np.array([0.2, 0.3, 0.5]) / np.array([0.5, 0.3, 0.2])
    np.testing.assert_allclose(rule.posteriors(p), shifted / shifted.sum(axis=1, keepdims=True), rtol=1e-12)


def test_invalid_rows_message_names_columns_for_the_first_ten_rows_in_the_caller_numbering() -> None:
    prepared = np.zeros((14, 2))
    prepared[1:13, 1] = np.nan  # twelve rows with a NaN, and row 13 finite but invalid (say, a posterior sum)
    valid = np.isfinite(prepared).all(axis=1)
    valid[13] = False
    message = kernel.invalid_rows_message(valid, 1, prepared=prepared, features=("x", "y"))
    named = [f"row {row + 1}: 'y'" for row in range(1, 11)]
    assert message.endswith("(" + "; ".join(named) + ")")
    assert "and 3 more (1-based)" in message
    eleven = np.arange(14) < 11
    assert "row(s) 0, 1, 2, 3, 4, 5, 6, 7, 8, 9 and 1 more (0-based)" in kernel.invalid_rows_message(~eleven)
    finite_only = kernel.invalid_rows_message(~np.eye(14, dtype=bool)[13], prepared=prepared, features=("x", "y"))
    assert finite_only.endswith("impossible evidence")
    assert kernel.invalid_rows_message(valid, prepared=prepared).endswith("impossible evidence")
