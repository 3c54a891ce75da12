"""Supplied evidence: upstream posteriors (corrected to the deployment priors) and per-class log-likelihoods.

Expected values come from published formulas written out here, not from policyc:
Saerens, Latinne & Decaestecker 2002 (references.md SA-1), Elkan 2001 Theorem 2 (EL-7) and
scipy.special.softmax for the log-domain normalisation (MV-3).
"""

from __future__ import annotations

import json
from collections.abc import Sequence
from pathlib import Path
from typing import Any

import numpy as np
import pytest
from scipy.special import softmax

from policyc.compiler.build import compile_policy
from policyc.runtime import InputError, Rule

CLASSES = ["low", "mid", "high"]


def supplied_rule(
    directory: Path,
    kind: str,
    priors: Sequence[float],
    *,
    classes: Sequence[str] = CLASSES,
    trained_priors: Sequence[float] | None = None,
    invalid_input: str = "reject",
    **evidence: Any,
) -> Rule:
    """Compile a 0-1 loss policy with a reject option on posterior or log-likelihood evidence."""
    loss = {f"say_{a}": {c: 0 if a == c else 1 for c in classes} for a in classes}
    body: dict[str, Any] = {"kind": kind, "columns": {c: f"col_{c}" for c in classes}}
    if kind == "posterior":
        assert trained_priors is not None
        body["trained_priors"] = dict(zip(classes, trained_priors, strict=True))
        body["calibration"] = {"method": "isotonic"}
    body |= evidence
    text = "\n".join(
        [
            "policy: supplied-test",
            f"classes: {json.dumps(list(classes))}",
            f"priors: {json.dumps(dict(zip(classes, priors, strict=True)))}",
            f"actions: {json.dumps(list(loss))}",
            f"loss: {json.dumps(loss)}",
            "reject: {action: refer, cost: 0.4}",
            f"invalid_input: {invalid_input}",
            f"evidence: {json.dumps(body)}",
            "",
        ]
    )
    directory.mkdir(parents=True, exist_ok=True)
    path = directory / "policy.yaml"
    path.write_text(text, encoding="utf-8")
    return compile_policy(path).rule


def saerens(posteriors: np.ndarray, trained: Sequence[float], deployed: Sequence[float]) -> np.ndarray:
    """Saerens, Latinne & Decaestecker 2002 (references.md SA-1), linear space, written out:
    p̃(i|x) = (π̃_i/π_i) p(i|x) / Σ_j (π̃_j/π_j) p(j|x)."""
    weighted = posteriors * (np.asarray(deployed) / np.asarray(trained))
    return weighted / weighted.sum(axis=1, keepdims=True)


def dirichlet_rows(n_rows: int, n_classes: int, seed: int) -> np.ndarray:
    rows = np.random.default_rng(seed).dirichlet(np.full(n_classes, 0.7), size=n_rows)
    return rows / rows.sum(axis=1, keepdims=True)


TRAINED = (0.5, 0.3, 0.2)
DEPLOYED = (0.1, 0.25, 0.65)


# --- Saerens correction ------------------------------------------------------------------------


def test_equal_priors_return_the_input(tmp_path: Path) -> None:
    # SA-1 (a): π̃ = π leaves every posterior as it is, atol 1e-12.
    rule = supplied_rule(tmp_path, "posterior", TRAINED, trained_priors=TRAINED)
    P = dirichlet_rows(500, 3, seed=0)
    np.testing.assert_allclose(rule.posteriors(P), P, rtol=0.0, atol=1e-12)


def test_correction_matches_the_published_formula(tmp_path: Path) -> None:
    # SA-1, written out in linear space, atol 1e-12.
    rule = supplied_rule(tmp_path, "posterior", DEPLOYED, trained_priors=TRAINED)
    P = dirichlet_rows(500, 3, seed=1)
    np.testing.assert_allclose(rule.posteriors(P), saerens(P, TRAINED, DEPLOYED), rtol=0.0, atol=1e-12)


def test_round_trip_returns_the_input(tmp_path: Path) -> None:
    # SA-1 (b): correcting π -> π̃ and then π̃ -> π gives back the input, atol 1e-12.
    forward = supplied_rule(tmp_path / "forward", "posterior", DEPLOYED, trained_priors=TRAINED)
    backward = supplied_rule(tmp_path / "backward", "posterior", TRAINED, trained_priors=DEPLOYED)
    P = dirichlet_rows(500, 3, seed=2)
    np.testing.assert_allclose(backward.posteriors(forward.posteriors(P)), P, rtol=0.0, atol=1e-12)


def test_elkan_theorem_2_golden_value(tmp_path: Path) -> None:
    # Elkan 2001, Theorem 2 (references.md EL-7): p' = b'(p - pb) / (b - pb + b'p - bb');
    # p = 0.3, b = 0.5, b' = 0.1 gives p' = 1/22. Saerens for K = 2 is the same correction.
    p, b, b_new = 0.3, 0.5, 0.1
    assert b_new * (p - p * b) / (b - p * b + b_new * p - b * b_new) == pytest.approx(1 / 22, rel=1e-15)
    rule = supplied_rule(
        tmp_path, "posterior", (1 - b_new, b_new), classes=["negative", "positive"], trained_priors=(1 - b, b)
    )
    corrected = rule.posteriors(np.array([[1 - p, p]]))
    assert corrected[0, 1] == pytest.approx(1 / 22, rel=1e-12)
    assert corrected[0, 0] == pytest.approx(21 / 22, rel=1e-12)


def test_zero_posterior_stays_zero(tmp_path: Path) -> None:
    # SA-1 (d): the correction multiplies by π̃_i/π_i, so an impossible class stays impossible.
    rule = supplied_rule(tmp_path, "posterior", DEPLOYED, trained_priors=TRAINED)
    P = np.array([[0.0, 0.4, 0.6], [0.0, 0.0, 1.0], [0.25, 0.75, 0.0]])
    corrected = rule.posteriors(P)
    assert (corrected[P == 0.0] == 0.0).all()
    np.testing.assert_allclose(corrected, saerens(P, TRAINED, DEPLOYED), rtol=0.0, atol=1e-15)


# --- invalid rows ------------------------------------------------------------------------------

GOOD = [0.2, 0.3, 0.5]
OFF_BY_TWICE_THE_TOLERANCE = [0.2, 0.3, 0.5 + 2e-6]  # default sum_tolerance is 1e-6
WITHIN_THE_TOLERANCE = [0.2, 0.3, 0.5 + 5e-7]
NEGATIVE = [-0.1, 0.6, 0.5]  # sums to 1
NOT_A_NUMBER = [np.nan, 0.5, 0.5]


def test_rows_off_the_simplex_are_rejected_under_invalid_input_reject(tmp_path: Path) -> None:
    rule = supplied_rule(tmp_path, "posterior", DEPLOYED, trained_priors=TRAINED, invalid_input="reject")
    P = np.array([GOOD, OFF_BY_TWICE_THE_TOLERANCE, WITHIN_THE_TOLERANCE, NEGATIVE, NOT_A_NUMBER])
    explained = rule.explain(P)
    assert explained.valid.tolist() == [True, False, True, False, False]
    assert rule.decide_names(P)[~explained.valid].tolist() == ["refer"] * 3
    assert np.isnan(rule.posteriors(P)[~explained.valid]).all()
    np.testing.assert_allclose(
        rule.posteriors(P)[explained.valid], saerens(P[explained.valid], TRAINED, DEPLOYED), rtol=0.0, atol=1e-12
    )


@pytest.mark.parametrize("bad", [OFF_BY_TWICE_THE_TOLERANCE, NEGATIVE, NOT_A_NUMBER])
def test_rows_off_the_simplex_are_errors_under_invalid_input_error(bad: list[float], tmp_path: Path) -> None:
    rule = supplied_rule(tmp_path, "posterior", DEPLOYED, trained_priors=TRAINED, invalid_input="error")
    rule.posteriors(np.array([GOOD, WITHIN_THE_TOLERANCE]))  # valid rows pass
    with pytest.raises(InputError, match=r"row\(s\) 1\b"):
        rule.posteriors(np.array([GOOD, bad]))
    with pytest.raises(InputError):
        rule.decide(np.array([bad]))


def test_a_wider_sum_tolerance_accepts_the_row(tmp_path: Path) -> None:
    rule = supplied_rule(tmp_path, "posterior", DEPLOYED, trained_priors=TRAINED, sum_tolerance=1e-5)
    assert rule.explain(np.array([OFF_BY_TWICE_THE_TOLERANCE])).valid.all()


def test_renormalise_divides_by_the_row_sum(tmp_path: Path) -> None:
    rule = supplied_rule(tmp_path, "posterior", DEPLOYED, trained_priors=TRAINED, renormalise=True)
    P = np.array([[0.1, 0.15, 0.25], [2.0, 1.0, 1.0], GOOD, [0.0, 3.0, 1.0]])
    expected = saerens(P / P.sum(axis=1, keepdims=True), TRAINED, DEPLOYED)
    np.testing.assert_allclose(rule.posteriors(P), expected, rtol=0.0, atol=1e-12)
    # negative entries, all-zero rows and NaN stay invalid even when rows are renormalised
    invalid = np.array([NEGATIVE, [0.0, 0.0, 0.0], NOT_A_NUMBER])
    assert not rule.explain(invalid).valid.any()
    assert rule.decide_names(invalid).tolist() == ["refer"] * 3


# --- log-likelihood evidence -------------------------------------------------------------------


def test_log_likelihood_posteriors_are_the_softmax_of_the_log_joint(tmp_path: Path) -> None:
    # P(k|x) = softmax_k(ln p(x|k) + ln P(k)) via scipy.special.softmax (references.md MV-3), atol 1e-12,
    # including far-field rows (ln p ≈ -1e4: exp underflows to 0 for every class, so a linear-space
    # evaluation would give 0/0) and a class with ln p = -inf (impossible).
    rule = supplied_rule(tmp_path, "log-likelihood", DEPLOYED)
    rng = np.random.default_rng(3)
    near = rng.normal(scale=3.0, size=(200, 3))
    far = -1e4 + rng.normal(scale=5.0, size=(50, 3))
    impossible = np.array([[-np.inf, -2.0, -3.0], [-1e4, -np.inf, -1e4 - 1.0]])
    L = np.vstack([near, far, impossible])
    assert (np.exp(far) == 0.0).all()  # the far field really underflows in linear space

    ours = rule.posteriors(L)

    expected = softmax(L + np.log(DEPLOYED), axis=1)
    assert np.isfinite(ours).all()
    np.testing.assert_allclose(ours, expected, rtol=0.0, atol=1e-12)
    assert ours[-2, 0] == 0.0 and ours[-1, 1] == 0.0


def test_log_likelihood_rows_with_nan_or_positive_infinity_are_invalid(tmp_path: Path) -> None:
    rule = supplied_rule(tmp_path, "log-likelihood", DEPLOYED)
    L = np.array([[-1.0, -2.0, -3.0], [np.nan, -2.0, -3.0], [np.inf, -2.0, -3.0], [-np.inf, -np.inf, -np.inf]])
    explained = rule.explain(L)
    assert explained.valid.tolist() == [True, False, False, False]
    assert rule.decide_names(L)[1:].tolist() == ["refer"] * 3
