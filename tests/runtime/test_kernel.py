"""The kernel's fast paths against the full computation and an outside reference.

The decide-only path (chunk buffers, no n-long posteriors), the one-row path and the tied and diagonal forms of
the Gaussian scores are rewritten arithmetic: each must give the decisions of the full computation, and the
posteriors must match scipy's log-densities through a softmax.
"""

from __future__ import annotations

import numpy as np
import pytest
import scipy.special
from helpers import gaussian_rule, loglik_evidence, policy_text, random_spd, rule_from_text
from hypothesis import given, settings
from hypothesis import strategies as st
from scipy.stats import multivariate_normal

from policyc.runtime import InputError, Rule, kernel

FORMS = {"full": 0.0, "tied": 1.0, "diagonal": 2.0}


def random_rule(seed: int, covariance: str, n_classes: int = 4, dim: int = 5, reject: bool = True) -> Rule:
    rng = np.random.default_rng(seed)
    means = rng.normal(scale=2.0, size=(n_classes, dim))
    if covariance == "tied":
        covariances = np.array([random_spd(rng, dim)] * n_classes)
    elif covariance == "diagonal":
        covariances = np.array([np.diag(rng.uniform(0.3, 3.0, dim)) for _ in range(n_classes)])
    else:
        covariances = np.array([random_spd(rng, dim) for _ in range(n_classes)])
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


@settings(max_examples=30, deadline=None)
@given(seed=st.integers(0, 2**31), covariance=st.sampled_from(list(FORMS)), rows=st.integers(2, 9000))
def test_decide_gives_exactly_the_decisions_of_the_full_computation(seed: int, covariance: str, rows: int) -> None:
    # decide keeps no n-long posteriors or risks; choose() on posteriors_and_risks is the full computation.
    rule = random_rule(seed % 1000, covariance)
    X = sample(rule, seed, rows)
    posteriors, risks, valid = kernel.posteriors_and_risks(X, rule.evidence, rule._plan)
    np.testing.assert_array_equal(rule.decide(X), kernel.choose(risks, valid, len(rule.actions) - 1))
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
    X = sample(rule, 14, 5 * kernel.CHUNK_ROWS + 17)
    np.testing.assert_array_equal(rule.decide(X, threads=threads), rule.decide(X, threads=1))


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


@pytest.mark.parametrize("dtype", ["float16", "int64", np.complex128, "no-such-type", None])
def test_only_float32_and_float64_kernels_exist(dtype: object) -> None:
    with pytest.raises(InputError, match="dtype must be float32 or float64"):
        random_rule(13, "full").astype(dtype)  # type: ignore[arg-type]
