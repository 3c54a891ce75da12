"""Calibration maps fitted into the rule, against scipy and scikit-learn (references.md CAL-1..CAL-5).

Upstream models are trained on data sets shipped with scikit-learn (wine, digits): a Gaussian naive
Bayes model on a few features is over-confident (its independence assumption counts correlated evidence
twice; common practice, no source), which is what calibration is for. Each data set is split three
ways: the upstream model's training rows, the calibration rows, and held-out rows.
"""

from __future__ import annotations

import csv
from dataclasses import dataclass
from pathlib import Path

import numpy as np
import pytest
import scipy.optimize
from helpers import compile_text, policy_text
from sklearn.datasets import load_digits, load_wine
from sklearn.isotonic import IsotonicRegression
from sklearn.linear_model import LogisticRegression
from sklearn.naive_bayes import GaussianNB

from policyc.evidence.calibration import (
    PROBABILITY_FLOOR,
    brier_score,
    expected_calibration_error,
    fit_dirichlet,
    fit_isotonic,
    fit_temperature,
    log_loss,
)
from policyc.runtime import kernel


@dataclass(frozen=True)
class Upstream:
    """Upstream probabilities and labels on the calibration rows and on held-out rows."""

    calibration: np.ndarray
    calibration_labels: np.ndarray
    held_out: np.ndarray
    held_out_labels: np.ndarray


def _upstream(data: tuple[np.ndarray, np.ndarray], features: list[int], train: int, calibrate: int) -> Upstream:
    X, y = data
    order = np.random.default_rng(0).permutation(y.size)
    X, y = X[order][:, features], y[order]
    model = GaussianNB().fit(X[:train], y[:train])
    cut = train + calibrate
    return Upstream(model.predict_proba(X[train:cut]), y[train:cut], model.predict_proba(X[cut:]), y[cut:])


@pytest.fixture(scope="module")
def wine() -> Upstream:
    """Wine (178 rows, 3 classes), upstream naive Bayes on alcohol and malic acid: 60 / 60 / 58 rows."""
    return _upstream(load_wine(return_X_y=True), [0, 1], 60, 60)


@pytest.fixture(scope="module")
def digits() -> Upstream:
    """Digits (1797 rows, 10 classes), upstream naive Bayes on the 16 middle pixels: 600 / 600 / 597 rows."""
    return _upstream(load_digits(return_X_y=True), list(range(24, 40)), 600, 600)


def softmax(scores: np.ndarray) -> np.ndarray:
    shifted = np.exp(scores - scores.max(axis=1, keepdims=True))
    return shifted / shifted.sum(axis=1, keepdims=True)


def apply_map(probabilities: np.ndarray, params: dict[str, np.ndarray]) -> np.ndarray:
    """The runtime kernel's map, normalised: q = softmax(calibrated ln q)."""
    with np.errstate(divide="ignore"):
        return softmax(kernel.calibrated_log_probabilities(probabilities, params))


def floored_log(probabilities: np.ndarray) -> np.ndarray:
    return np.log(np.maximum(probabilities, PROBABILITY_FLOOR))


def test_temperature_matches_a_direct_minimisation_of_the_negative_log_likelihood(digits: Upstream) -> None:
    # CAL-1 (Guo et al. 2017): T minimises NLL of softmax(ln p / T); oracle scipy.optimize.minimize_scalar
    z, y = floored_log(digits.calibration), digits.calibration_labels

    def nll(temperature: float) -> float:
        return -float(np.sum(np.log(softmax(z / temperature)[np.arange(y.size), y])))

    reference = scipy.optimize.minimize_scalar(nll, bounds=(0.05, 50.0), method="bounded", options={"xatol": 1e-12})
    temperature = fit_temperature(digits.calibration, y)
    assert temperature == pytest.approx(reference.x, rel=1e-6)
    params = {"calibration_floor": np.array(PROBABILITY_FLOOR), "calibration_inverse_temperature": 1 / temperature}
    np.testing.assert_allclose(
        apply_map(digits.held_out, params), softmax(floored_log(digits.held_out) / reference.x), atol=1e-6
    )


def test_unregularised_dirichlet_is_multinomial_logistic_regression_on_log_probabilities(wine: Upstream) -> None:
    # CAL-2 (Kull et al. 2019): with no penalty, softmax(W ln p + b) is multinomial logistic regression on
    # ln p; oracle scikit-learn LogisticRegression without penalty (C=inf, the spelling of penalty=None
    # that scikit-learn 1.8 keeps), 1e-4 (optimiser tolerance)
    z, y = floored_log(wine.calibration), wine.calibration_labels
    oracle = LogisticRegression(C=np.inf, tol=1e-10, max_iter=10_000).fit(z, y)
    weights, bias = fit_dirichlet(wine.calibration, y)
    params = {
        "calibration_floor": np.array(PROBABILITY_FLOOR),
        "calibration_weights": weights,
        "calibration_bias": bias,
    }
    for probabilities in (wine.calibration, wine.held_out):
        expected = oracle.predict_proba(floored_log(probabilities))
        np.testing.assert_allclose(apply_map(probabilities, params), expected, atol=1e-4)


def test_isotonic_matches_scikit_learn_per_class_renormalised(digits: Upstream) -> None:
    # CAL-3 (Zadrozny & Elkan 2002): per class IsotonicRegression(out_of_bounds="clip") of 1[y = k] on p_k,
    # rows renormalised; oracle scikit-learn, 1e-9. Naive Bayes gives many exact 0 and 1: ties are pooled.
    p, y = digits.calibration, digits.calibration_labels
    params = _fitted_map(digits, "isotonic")
    for probabilities in (p, digits.held_out):
        columns = [
            IsotonicRegression(out_of_bounds="clip").fit(p[:, k], y == k).predict(probabilities[:, k])
            for k in range(p.shape[1])
        ]
        expected = np.stack(columns, axis=1)
        mapped = expected.sum(axis=1) > 0  # rows the map cannot calibrate are invalid input at run time
        expected = expected[mapped] / expected[mapped].sum(axis=1, keepdims=True)
        np.testing.assert_allclose(apply_map(probabilities, params)[mapped], expected, atol=1e-9)


def _fitted_map(upstream: Upstream, method: str) -> dict[str, np.ndarray]:
    p, y = upstream.calibration, upstream.calibration_labels
    floor = {"calibration_floor": np.array(PROBABILITY_FLOOR)}
    if method == "temperature":
        return floor | {"calibration_inverse_temperature": np.array(1 / fit_temperature(p, y))}
    if method == "dirichlet":
        weights, bias = fit_dirichlet(p, y, regularisation=1e-3)
        return floor | {"calibration_weights": weights, "calibration_bias": bias}
    pieces = fit_isotonic(p, y)
    return floor | {
        "calibration_thresholds": np.concatenate([x for x, _ in pieces]),
        "calibration_values": np.concatenate([v for _, v in pieces]),
        "calibration_ends": np.cumsum([x.size for x, _ in pieces]).astype(float),
    }


@pytest.mark.parametrize("data", ["wine", "digits"])
def test_temperature_and_dirichlet_never_worsen_log_loss_on_the_calibration_data(
    data: str, request: pytest.FixtureRequest
) -> None:
    # CAL-1, CAL-2: both families contain the identity (T = 1; W = I, b = 0), so the maximum-likelihood fit
    # is never worse than the input on the data it was fitted on
    upstream: Upstream = request.getfixturevalue(data)
    p, y = upstream.calibration, upstream.calibration_labels
    before = log_loss(p, y)
    temperature = {
        "calibration_floor": np.array(PROBABILITY_FLOOR),
        "calibration_inverse_temperature": 1 / fit_temperature(p, y),
    }
    weights, bias = fit_dirichlet(p, y)
    dirichlet = {
        "calibration_floor": np.array(PROBABILITY_FLOOR),
        "calibration_weights": weights,
        "calibration_bias": bias,
    }
    assert log_loss(apply_map(p, temperature), y) <= before
    assert log_loss(apply_map(p, dirichlet), y) <= before


@pytest.mark.parametrize("method", ["temperature", "dirichlet", "isotonic"])
def test_calibration_lowers_the_expected_calibration_error_of_an_over_confident_model_on_held_out_rows(
    digits: Upstream, method: str
) -> None:
    # CAL-5: ECE (Naeini et al. 2015; Guo et al. 2017 §2) of naive Bayes on digits, before and after
    params = _fitted_map(digits, method)
    before = expected_calibration_error(digits.held_out, digits.held_out_labels)
    after = expected_calibration_error(apply_map(digits.held_out, params), digits.held_out_labels)
    assert before > 0.15  # the upstream model is over-confident
    assert after < before / 2


def test_scores_match_a_hand_computation() -> None:
    # CAL-5: Brier (Brier 1950) and ECE (Naeini et al. 2015) by hand for three rows, each alone in its bin
    q = np.array([[0.8, 0.2], [0.6, 0.4], [0.3, 0.7]])
    y = np.array([0, 1, 1])
    # Brier: (0.04 + 0.04) + (0.36 + 0.36) + (0.09 + 0.09) = 0.98, over 3 rows
    assert brier_score(q, y) == pytest.approx(0.98 / 3, abs=1e-15)
    # ECE: confidences 0.8, 0.6, 0.7, correct 1, 0, 1: (|1 - 0.8| + |0 - 0.6| + |1 - 0.7|) / 3
    assert expected_calibration_error(q, y) == pytest.approx(1.1 / 3, abs=1e-15)
    assert log_loss(q, y) == pytest.approx(-(np.log(0.8) + np.log(0.4) + np.log(0.7)) / 3, abs=1e-15)


def _write_sample(path: Path, probabilities: np.ndarray, labels: np.ndarray, classes: list[str]) -> None:
    with path.open("w", newline="") as handle:
        writer = csv.writer(handle, lineterminator="\n")
        writer.writerow([*(f"p_{c}" for c in classes), "label"])
        for row, label in zip(probabilities.tolist(), labels.tolist(), strict=True):
            writer.writerow([*map(repr, row), classes[label]])


def test_a_compiled_rule_applies_the_fitted_temperature_under_the_calibration_class_mix(
    wine: Upstream, tmp_path: Path
) -> None:
    # CAL-1 end to end: with deployment priors equal to the calibration data's class frequencies the rule's
    # posteriors are the calibrated probabilities themselves; oracle as in the first test
    classes = ["c0", "c1", "c2"]
    _write_sample(tmp_path / "calibration.csv", wine.calibration, wine.calibration_labels, classes)
    frequencies = np.bincount(wine.calibration_labels, minlength=3) / wine.calibration_labels.size
    evidence = {
        "kind": "posterior",
        "columns": {c: f"p_{c}" for c in classes},
        "calibrate": {"method": "temperature", "data": "calibration.csv", "label": "label"},
    }
    text = policy_text(
        classes=classes, priors=frequencies.tolist(), actions=["a0", "a1", "a2"], loss=1 - np.eye(3), evidence=evidence
    )
    rule = compile_text(tmp_path, text).rule
    z, y = floored_log(wine.calibration), wine.calibration_labels
    reference = scipy.optimize.minimize_scalar(
        lambda t: -float(np.sum(np.log(softmax(z / t)[np.arange(y.size), y]))),
        bounds=(0.05, 50.0),
        method="bounded",
        options={"xatol": 1e-12},
    )
    np.testing.assert_allclose(
        rule.posteriors(wine.held_out), softmax(floored_log(wine.held_out) / reference.x), atol=1e-6
    )
    described = rule.manifest["evidence"]["calibrate"]
    assert (
        described["rows"] == 60
        and described["scores"]["after"]["log_loss"] <= described["scores"]["before"]["log_loss"]
    )
