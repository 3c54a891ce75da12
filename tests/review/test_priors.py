"""EM estimate of new class priors (Saerens, Latinne & Decaestecker 2002; references.md SA-2..SA-4)."""

from __future__ import annotations

import dataclasses
import json
import re
from pathlib import Path

import numpy as np
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st
from scipy import optimize, special, stats

from policyc.review.priors import (
    PriorEstimate,
    estimate_priors_from_posteriors,
    render_priors,
    rounded_priors,
    verdict,
)

CLASSES = ("a", "b", "c")
MEANS = np.array([[0.0, 0.0], [2.0, 0.0], [0.0, 2.0]])


def _exact_posteriors(new_priors: np.ndarray, rows: int, seed: int) -> tuple[np.ndarray, np.ndarray]:
    """Rows drawn with ``new_priors`` from three unit Gaussians; exact posteriors under uniform priors."""
    rng = np.random.default_rng(seed)
    labels = rng.choice(3, size=rows, p=new_priors)
    X = MEANS[labels] + rng.normal(size=(rows, 2))
    log_likelihoods = np.stack([stats.multivariate_normal(m, np.eye(2)).logpdf(X) for m in MEANS], axis=1)
    return special.softmax(log_likelihoods, axis=1), labels


def test_em_fixed_point_maximises_the_new_data_likelihood() -> None:
    # Saerens et al. 2002 (references.md SA-3): EM's fixed point maximises
    # ℓ(π̃) = Σ ln Σ_j (π̃_j/π_j) p_j(x); an independent optimiser (BFGS, softmax parameters) finds the same.
    uniform = np.full(3, 1 / 3)
    posteriors, _ = _exact_posteriors(np.array([0.6, 0.3, 0.1]), 5000, seed=11)
    estimate = estimate_priors_from_posteriors(posteriors, uniform, CLASSES, tolerance=1e-13)

    def negative_log_likelihood(z: np.ndarray) -> float:
        return -float(np.sum(np.log((posteriors / uniform) @ special.softmax(z))))

    result = optimize.minimize(negative_log_likelihood, np.zeros(3), method="BFGS", options={"gtol": 1e-10})
    assert estimate.converged
    np.testing.assert_allclose(estimate.priors, special.softmax(result.x), atol=1e-6)


@pytest.mark.parametrize("new_priors", [(0.6, 0.3, 0.1), (0.2, 0.2, 0.6)])
def test_estimate_is_within_three_standard_errors_of_the_true_mix(new_priors: tuple[float, ...]) -> None:
    # references.md SA-3 statistical check: within ~3·sqrt(π(1-π)/N) when the posteriors are exact.
    truth = np.array(new_priors)
    rows = 20_000
    posteriors, _ = _exact_posteriors(truth, rows, seed=5)
    estimate = estimate_priors_from_posteriors(posteriors, np.full(3, 1 / 3), CLASSES)
    # the EM estimate also carries the class-overlap uncertainty, so allow a little over the label s.e.
    tolerance = 4 * np.sqrt(truth * (1 - truth) / rows)
    assert np.all(np.abs(estimate.priors - truth) < tolerance)
    assert np.all((estimate.low <= truth) & (truth <= estimate.high))
    assert estimate.p_value < 1e-6  # uniform -> skewed is a large change


def test_no_change_of_priors_gives_a_small_statistic() -> None:
    # references.md SA-4: 2[ℓ(π̂) - ℓ(π)] ~ χ²(K-1) when the priors did not change.
    uniform = np.full(3, 1 / 3)
    posteriors, _ = _exact_posteriors(uniform, 20_000, seed=8)
    estimate = estimate_priors_from_posteriors(posteriors, uniform, CLASSES)
    assert estimate.change_statistic < stats.chi2.ppf(0.999, 2)
    assert estimate.p_value > 0.001


def test_zero_prior_class_stays_zero_and_intervals_are_ordered() -> None:
    rule_priors = np.array([0.5, 0.5, 0.0])
    posteriors, _ = _exact_posteriors(np.array([0.7, 0.3, 0.0]), 4000, seed=3)
    two_class = posteriors[:, :2] / posteriors[:, :2].sum(axis=1, keepdims=True)
    padded = np.hstack([two_class, np.zeros((two_class.shape[0], 1))])
    estimate = estimate_priors_from_posteriors(padded, rule_priors, CLASSES)
    assert estimate.priors[2] == 0.0
    assert estimate.priors.sum() == pytest.approx(1.0, abs=1e-12)
    assert np.all(estimate.low <= estimate.priors) and np.all(estimate.priors <= estimate.high)
    payload = json.loads(render_priors(estimate, "json"))
    assert set(payload) >= {"priors", "interval", "iterations", "change_statistic", "p_value"}


def test_priors_command_reports_the_documented_json(tmp_path: Path) -> None:
    from click.testing import CliRunner

    from policyc.cli import main

    root = Path(__file__).resolve().parents[2] / "policies-demo" / "packhouse"
    runner = CliRunner()
    rule = tmp_path / "packhouse.rule"
    assert runner.invoke(main, ["compile", str(root / "policy.yaml"), "-o", str(rule)]).exit_code == 0
    result = runner.invoke(main, ["priors", str(rule), str(root / "train.csv"), "--format", "json"])
    assert result.exit_code == 0, result.output
    report = json.loads(result.output)
    assert set(report) >= {"priors", "interval", "iterations", "change_statistic", "p_value"}
    assert sum(report["priors"].values()) == pytest.approx(1.0, abs=1e-9)
    # the training file holds 15% defects (policies-demo/generate.py) against the rule's 10%: a detectable shift
    low, high = report["interval"]["defect"]
    assert low <= 0.15 <= high and report["p_value"] < 0.01
    text = runner.invoke(main, ["priors", str(rule), str(root / "incoming.csv")])
    assert text.exit_code == 0 and "p-value" in text.output
    missing = runner.invoke(main, ["priors", str(rule), str(tmp_path / "nope.csv")])
    assert missing.exit_code == 1 and "no such file" in missing.output


def test_priors_says_the_verdict_in_words_and_prints_a_block_that_checks_clean(tmp_path: Path) -> None:
    from click.testing import CliRunner

    from policyc.cli import main
    from policyc.language.checks import check_file

    root = Path(__file__).resolve().parents[2] / "policies-demo" / "packhouse"
    runner = CliRunner()
    # a policy file is accepted as it is by diff, evaluate and plot (compiled in memory)
    shifted = runner.invoke(main, ["priors", str(root / "policy.yaml"), str(root / "train.csv")])
    assert shifted.exit_code == 0, shifted.output
    assert 'The change test rejects "no change" at the 0.05 level' in shifted.stdout
    block = runner.invoke(main, ["priors", str(root / "policy.yaml"), str(root / "train.csv"), "--format", "yaml"])
    assert block.exit_code == 0 and block.stdout.startswith("priors:\n  premium: ")
    assert block.stdout in shifted.stdout  # the text report ends with the same block
    # pasted into the policy, the block passes check (it sums to 1 within the check's tolerance)
    text = (root / "policy.yaml").read_text(encoding="utf-8")
    start = text.index("priors:")
    pasted = text[:start] + block.stdout + text[text.index("\n", start) + 1 :]
    (tmp_path / "policy.yaml").write_text(pasted.replace("data: train.csv", f"data: {root / 'train.csv'}"), "utf-8")
    assert [d.code for d in check_file(tmp_path / "policy.yaml").diagnostics if d.is_error] == []


def test_priors_says_when_the_test_does_not_reject_no_change() -> None:
    uniform = np.full(3, 1 / 3)
    posteriors, _ = _exact_posteriors(uniform, 2000, seed=1)
    estimate = estimate_priors_from_posteriors(posteriors, uniform, CLASSES)
    assert estimate.p_value > 0.05  # the mix did not change, and on this seeded draw the test agrees
    assert 'does not reject "no change" at the 0.05 level' in render_priors(estimate, "text")


def test_rounded_priors_sum_to_one_exactly_in_decimals() -> None:
    posteriors, _ = _exact_posteriors(np.array([1 / 3, 1 / 3, 1 / 3]), 3000, seed=2)
    estimate = estimate_priors_from_posteriors(posteriors, np.array([0.2, 0.3, 0.5]), CLASSES)
    rounded = rounded_priors(estimate)
    assert round(sum(rounded.values()), 10) == 1.0
    assert max(abs(rounded[c] - p) for c, p in zip(CLASSES, estimate.priors, strict=True)) < 2e-4


# --- the estimate, its interval and the change statistic against independent computations -------------

UNIFORM = np.full(3, 1 / 3)


def _log_likelihood(posteriors: np.ndarray, rule_priors: np.ndarray, priors: np.ndarray) -> float:
    # references.md SA-3: ℓ(π̃) = Σ_rows ln Σ_j (π̃_j / π_j) p_j(x)
    return float(np.sum(np.log((posteriors / rule_priors) @ priors)))


def _free_log_likelihood(posteriors: np.ndarray, rule_priors: np.ndarray, free: np.ndarray) -> float:
    # ℓ in the K-1 free coordinates, the last prior being 1 - Σ free
    return _log_likelihood(posteriors, rule_priors, np.append(free, 1.0 - free.sum()))


def _numerical_standard_errors(posteriors: np.ndarray, rule_priors: np.ndarray, priors: np.ndarray) -> np.ndarray:
    """Standard errors of all K priors from a central-difference Hessian of ℓ in the free coordinates."""
    free, step = priors[:-1], 1e-4
    size = free.size
    hessian = np.empty((size, size))
    for i in range(size):
        for j in range(size):
            shift_i, shift_j = step * np.eye(size)[i], step * np.eye(size)[j]
            # ∂²ℓ/∂x_i∂x_j ≈ [ℓ(x+h_i+h_j) - ℓ(x+h_i-h_j) - ℓ(x-h_i+h_j) + ℓ(x-h_i-h_j)] / 4h²
            hessian[i, j] = (
                _free_log_likelihood(posteriors, rule_priors, free + shift_i + shift_j)
                - _free_log_likelihood(posteriors, rule_priors, free + shift_i - shift_j)
                - _free_log_likelihood(posteriors, rule_priors, free - shift_i + shift_j)
                + _free_log_likelihood(posteriors, rule_priors, free - shift_i - shift_j)
            ) / (4 * step**2)
    covariance = np.linalg.inv(-hessian)  # inverse observed information
    last = np.sum(covariance)  # Var(1 - Σ free) = 1ᵀ C 1
    return np.sqrt(np.append(np.diag(covariance), last))


def _maximum_likelihood(posteriors: np.ndarray, rule_priors: np.ndarray) -> np.ndarray:
    """ℓ maximised by BFGS on softmax parameters with its analytic gradient, to a gradient of 1e-12 per row."""
    ratios = posteriors / rule_priors
    rows = ratios.shape[0]

    def negative_mean(z: np.ndarray) -> tuple[float, np.ndarray]:
        priors = special.softmax(z)
        mixture = ratios @ priors
        gradient_priors = -(ratios / mixture[:, None]).mean(axis=0)
        # chain rule through the softmax: ∂π_j/∂z_i = π_j (δ_ij - π_i)
        return -float(np.log(mixture).sum() / rows), priors * (gradient_priors - priors @ gradient_priors)

    result = optimize.minimize(
        negative_mean, np.zeros(ratios.shape[1]), jac=True, method="BFGS", options={"gtol": 1e-12}
    )
    return special.softmax(result.x)


@pytest.mark.parametrize("truth", [(0.6, 0.3, 0.1), (0.25, 0.5, 0.25)])
def test_estimate_matches_a_tightly_converged_maximum_likelihood(truth: tuple[float, ...]) -> None:
    # references.md SA-3: the EM fixed point is the maximum-likelihood estimate; compared at 1e-8.
    posteriors, _ = _exact_posteriors(np.array(truth), 3000, seed=21)
    estimate = estimate_priors_from_posteriors(posteriors, UNIFORM, CLASSES, tolerance=1e-13)
    assert estimate.converged and 1 < estimate.iterations < 10_000
    np.testing.assert_allclose(estimate.priors, _maximum_likelihood(posteriors, UNIFORM), atol=1e-8)


def test_default_tolerance_stops_within_1e_8_of_the_maximum_likelihood() -> None:
    # Convergence is judged on the largest change of any prior: stopping on a smaller one would stop early.
    posteriors, _ = _exact_posteriors(np.array([0.5, 0.1, 0.4]), 3000, seed=4)
    estimate = estimate_priors_from_posteriors(posteriors, UNIFORM, CLASSES)
    np.testing.assert_allclose(estimate.priors, _maximum_likelihood(posteriors, UNIFORM), atol=1e-8)


def test_iterations_stop_at_max_iterations_without_convergence() -> None:
    posteriors, _ = _exact_posteriors(np.array([0.6, 0.3, 0.1]), 2000, seed=6)
    capped = estimate_priors_from_posteriors(posteriors, UNIFORM, CLASSES, max_iterations=3)
    assert (capped.iterations, capped.converged) == (3, False)
    # three EM steps from the rule priors (references.md SA-2: E-step correction, M-step mean), written out
    priors = UNIFORM.copy()
    for _ in range(3):
        corrected = posteriors / UNIFORM * priors
        priors = (corrected / corrected.sum(axis=1, keepdims=True)).mean(axis=0)
    np.testing.assert_allclose(capped.priors, priors, rtol=1e-12)
    full = estimate_priors_from_posteriors(posteriors, UNIFORM, CLASSES)
    assert full.converged and full.iterations > 3


@pytest.mark.parametrize(("truth", "rule_priors"), [((0.6, 0.3, 0.1), UNIFORM), ((1 / 3,) * 3, UNIFORM)])
def test_change_statistic_and_p_value_follow_the_likelihood_ratio(truth, rule_priors) -> None:
    # references.md SA-4: statistic 2[ℓ(π̂) - ℓ(π)], p-value from χ² on K - 1 = 2 degrees of freedom (scipy).
    posteriors, _ = _exact_posteriors(np.array(truth), 2000, seed=9)
    estimate = estimate_priors_from_posteriors(posteriors, rule_priors, CLASSES)
    expected = 2 * (
        _log_likelihood(posteriors, rule_priors, estimate.priors)
        - _log_likelihood(posteriors, rule_priors, rule_priors)
    )
    assert estimate.change_statistic == pytest.approx(expected, rel=1e-9, abs=1e-9)
    assert estimate.p_value == pytest.approx(stats.chi2.sf(expected, 2), rel=1e-9)


def test_unchanged_mix_gives_a_statistic_below_one_and_a_large_p_value() -> None:
    # With the rule's own mix the statistic is small (χ²(2) has mean 2); here it is below 1 and must not be rounded up.
    posteriors, _ = _exact_posteriors(UNIFORM, 2000, seed=9)
    estimate = estimate_priors_from_posteriors(posteriors, UNIFORM, CLASSES)
    expected = 2 * (
        _log_likelihood(posteriors, UNIFORM, estimate.priors) - _log_likelihood(posteriors, UNIFORM, UNIFORM)
    )
    assert 0.0 < expected < 1.0
    assert estimate.change_statistic == pytest.approx(expected, rel=1e-9)


def _two_class_posteriors(rows: int, seed: int) -> np.ndarray:
    posteriors, _ = _exact_posteriors(np.array([0.7, 0.3, 0.0]), rows, seed)
    return posteriors[:, :2] / posteriors[:, :2].sum(axis=1, keepdims=True)


def test_two_classes_interval_and_p_value_in_closed_form() -> None:
    # Two classes: ℓ''(π) = -Σ (a_1 - a_2)² / s², se = 1/√(-ℓ''), interval π̂ ± z se with z = Φ⁻¹(0.975) (Wald);
    # change statistic against χ² on 1 degree of freedom (references.md SA-4).
    posteriors = _two_class_posteriors(3000, seed=12)
    rule_priors = np.array([0.5, 0.5])
    estimate = estimate_priors_from_posteriors(posteriors, rule_priors, CLASSES[:2])
    ratios = posteriors / rule_priors
    mixture = ratios @ estimate.priors
    se = 1.0 / np.sqrt(np.sum(((ratios[:, 0] - ratios[:, 1]) / mixture) ** 2))
    z = stats.norm.ppf(0.975)
    np.testing.assert_allclose(estimate.low, estimate.priors - z * se, rtol=1e-9)
    np.testing.assert_allclose(estimate.high, estimate.priors + z * se, rtol=1e-9)
    assert estimate.p_value == pytest.approx(stats.chi2.sf(estimate.change_statistic, 1), rel=1e-9)
    assert estimate.p_value < 1e-6  # 0.5 -> 0.7 on 3000 rows is a clear change


def test_three_class_standard_errors_match_a_numerical_hessian() -> None:
    posteriors, _ = _exact_posteriors(np.array([0.5, 0.3, 0.2]), 3000, seed=13)
    estimate = estimate_priors_from_posteriors(posteriors, UNIFORM, CLASSES, tolerance=1e-13, confidence=0.9)
    half_width = (estimate.high - estimate.low) / 2
    expected = stats.norm.ppf(0.95) * _numerical_standard_errors(posteriors, UNIFORM, estimate.priors)
    np.testing.assert_allclose(half_width, expected, rtol=1e-5)
    np.testing.assert_allclose((estimate.high + estimate.low) / 2, estimate.priors, rtol=1e-12)


def test_an_interval_is_clipped_to_zero_and_one() -> None:
    posteriors = _two_class_posteriors(40, seed=14)
    estimate = estimate_priors_from_posteriors(posteriors, np.array([0.5, 0.5]), CLASSES[:2], confidence=0.999999)
    assert np.all(estimate.low >= 0.0) and np.all(estimate.high <= 1.0)
    assert estimate.low[1] == 0.0 and estimate.high[0] == 1.0


def _longhand_em(posteriors: np.ndarray, rule_priors: np.ndarray, tolerance: float) -> tuple[np.ndarray, int]:
    """references.md SA-2 written out: E-step correction, M-step mean, stop once no prior moves by tolerance."""
    priors, iterations = rule_priors.copy(), 0
    while True:
        corrected = posteriors / rule_priors * priors
        updated = (corrected / corrected.sum(axis=1, keepdims=True)).mean(axis=0)
        iterations += 1
        moved = np.max(np.abs(updated - priors))
        priors = updated
        if moved < tolerance:
            return priors, iterations


@pytest.mark.parametrize("means", [(0.0, 0.6), (0.0, 0.6, 1.5)])
def test_iteration_count_follows_the_stopping_rule_at_the_default_tolerance(means: tuple[float, ...]) -> None:
    # Overlapping classes converge slowly (hundreds of steps), so the count pins the default tolerance of 1e-10 and
    # the rule "no prior moves by as much as the tolerance" (with three classes the priors move by different amounts).
    rng = np.random.default_rng(17)
    mix = np.array([0.35, 0.65]) if len(means) == 2 else np.array([0.3, 0.3, 0.4])
    labels = rng.choice(len(means), size=1500, p=mix)
    x = rng.normal(np.array(means)[labels], 1.0)
    posteriors = special.softmax(np.stack([stats.norm(m, 1.0).logpdf(x) for m in means], axis=1), axis=1)
    rule_priors = np.full(len(means), 1 / len(means))
    estimate = estimate_priors_from_posteriors(posteriors, rule_priors, CLASSES[: len(means)])
    priors, iterations = _longhand_em(posteriors, rule_priors, 1e-10)
    assert estimate.converged and estimate.iterations == iterations > 50
    np.testing.assert_allclose(estimate.priors, priors, rtol=1e-13)
    assert estimate.rows == 1500


def test_nearly_identical_classes_hit_the_default_iteration_cap() -> None:
    # Classes N(0, 1) and N(0.02, 1) barely differ, so EM's linear rate is within 1e-3 of 1: 10 000 steps still move
    # the estimate by more than 1e-10, and the estimate stops at the cap saying it did not converge.
    rng = np.random.default_rng(2)
    x = rng.normal(0.0, 1.0, size=400)
    posteriors = special.softmax(np.stack([stats.norm(0.0).logpdf(x), stats.norm(0.02).logpdf(x)], axis=1), axis=1)
    estimate = estimate_priors_from_posteriors(posteriors, np.array([0.5, 0.5]), CLASSES[:2])
    assert (estimate.iterations, estimate.converged) == (10_000, False)


def test_one_class_with_a_prior_has_nothing_to_test() -> None:
    # K' = 1 class with a non-zero prior: χ² on 0 degrees of freedom is no test, so the p-value is 1.
    posteriors = np.array([[1.0, 0.0], [1.0, 0.0], [1.0, 0.0]])
    estimate = estimate_priors_from_posteriors(posteriors, np.array([1.0, 0.0]), CLASSES[:2])
    assert estimate.priors.tolist() == [1.0, 0.0]
    assert (estimate.change_statistic, estimate.p_value) == (0.0, 1.0)
    assert estimate.low.tolist() == [1.0, 0.0] and estimate.high.tolist() == [1.0, 0.0]


def _loglik_rule(tmp_path: Path, rows: list[tuple[str, str]]) -> tuple[object, Path]:
    from helpers import rule_from_text, two_class_text

    data = tmp_path / "scores.csv"
    data.write_text("ll_c0,ll_c1\n" + "".join(f"{a},{b}\n" for a, b in rows), encoding="utf-8")
    return rule_from_text(two_class_text(invalid_input="reject", reject_cost=0.4)), data


def test_priors_of_a_file_use_its_valid_rows_and_a_95_percent_interval(tmp_path: Path) -> None:
    from policyc.review.priors import estimate_priors

    rule, data = _loglik_rule(tmp_path, [("0.0", "-1.0"), ("nan", "0.0"), ("-2.0", "0.0"), ("-0.5", "0.0")])
    estimate = estimate_priors(rule, data)  # type: ignore[arg-type]
    assert estimate.rows == 3  # the NaN row is not evidence
    valid_rows = np.array([[0.0, -1.0], [-2.0, 0.0], [-0.5, 0.0]])
    posteriors = rule.posteriors(valid_rows)  # type: ignore[attr-defined]
    reference = estimate_priors_from_posteriors(posteriors, np.array([0.5, 0.5]), ("c0", "c1"), confidence=0.95)
    assert estimate.confidence == 0.95
    # the same rows through the same EM; only the kernel's batch (4 rows or 3) differs, so rounding at most
    np.testing.assert_allclose(estimate.low, reference.low, rtol=1e-12)
    np.testing.assert_allclose(estimate.priors, reference.priors, rtol=1e-12)


def test_a_file_with_one_valid_row_is_enough_and_none_is_refused(tmp_path: Path) -> None:
    from policyc.errors import DataError
    from policyc.review.priors import estimate_priors

    rule, data = _loglik_rule(tmp_path, [("nan", "0.0"), ("-1.0", "0.0")])
    assert estimate_priors(rule, data).rows == 1  # type: ignore[arg-type]
    rule, data = _loglik_rule(tmp_path, [("nan", "0.0"), ("0.0", "nan")])
    with pytest.raises(DataError, match="no valid rows to estimate priors from"):
        estimate_priors(rule, data)  # type: ignore[arg-type]


def test_rule_priors_that_are_not_uniform_divide_the_posteriors() -> None:
    # references.md SA-2 written out (_longhand_em): the posteriors are computed under the rule's own priors,
    # p_k(x) ∝ π_k f_k(x), and EM corrects them by π̃_k / π_k.
    rule_priors = np.array([0.2, 0.3, 0.5])
    uniform_posteriors, _ = _exact_posteriors(np.array([0.5, 0.3, 0.2]), 2000, seed=21)
    posteriors = uniform_posteriors * rule_priors
    posteriors /= posteriors.sum(axis=1, keepdims=True)
    estimate = estimate_priors_from_posteriors(posteriors, rule_priors, CLASSES)
    priors, iterations = _longhand_em(posteriors, rule_priors, 1e-10)
    assert estimate.iterations == iterations
    np.testing.assert_allclose(estimate.priors, priors, rtol=1e-12)


def test_a_file_with_a_class_of_zero_prior_is_estimated_as_its_posteriors_are(tmp_path: Path) -> None:
    from helpers import loglik_evidence, policy_text, rule_from_text

    from policyc.review.priors import estimate_priors

    classes = ["c0", "c1", "c2"]
    text = policy_text(
        classes=classes,
        priors=[0.4, 0.6, 0.0],
        actions=["a0", "a1", "a2"],
        loss=1.0 - np.eye(3),
        evidence=loglik_evidence(classes),
    )
    rule = rule_from_text(text)
    rng = np.random.default_rng(9)
    values = rng.normal(size=(40, 3))
    data = tmp_path / "scores.csv"
    data.write_text(
        "ll_c0,ll_c1,ll_c2\n" + "".join(f"{a!r},{b!r},{c!r}\n" for a, b, c in values.tolist()), encoding="utf-8"
    )
    seen: list[int] = []
    estimate = estimate_priors(rule, data, progress=lambda rows, total, stage="": seen.append(rows))
    assert sum(seen) == 40  # every row read is counted once
    reference = estimate_priors_from_posteriors(rule.posteriors(values), np.array([0.4, 0.6, 0.0]), tuple(classes))
    assert estimate.priors[2] == 0.0 and estimate.high[2] == 0.0  # a class the rule rules out stays out
    np.testing.assert_allclose(estimate.priors, reference.priors, rtol=1e-12)


# --- the report: the verdict's boundary, the degrees of freedom shown, the block to paste -------------------


def test_a_p_value_equal_to_the_level_rejects_no_change() -> None:
    # A test from a p-value rejects H0 at level α iff p ≤ α (Casella & Berger, Statistical Inference, 2nd ed.,
    # Theorem 8.3.27; from memory): the boundary p = α = 1 - confidence rejects, the next double above it does not.
    posteriors, _ = _exact_posteriors(UNIFORM, 500, seed=1)
    estimate = estimate_priors_from_posteriors(posteriors, UNIFORM, CLASSES)
    level = 1.0 - estimate.confidence
    at_level = dataclasses.replace(estimate, p_value=level)
    assert at_level.rejects_no_change
    assert 'The change test rejects "no change" at the 0.05 level' in verdict(at_level)
    above = dataclasses.replace(estimate, p_value=float(np.nextafter(level, 1.0)))
    assert not above.rejects_no_change
    assert 'does not reject "no change"' in verdict(above)


@pytest.mark.parametrize(("rule_priors", "active"), [(UNIFORM, 3), (np.array([0.5, 0.5, 0.0]), 2)])
def test_the_text_report_shows_the_degrees_of_freedom_of_its_p_value(rule_priors: np.ndarray, active: int) -> None:
    # references.md SA-4: χ² on K' - 1 degrees of freedom, K' the classes with a non-zero rule prior; the p-value the
    # report prints is scipy's χ² survival function of the statistic at the degrees of freedom it prints.
    posteriors, _ = _exact_posteriors(np.array([0.5, 0.3, 0.2]), 1000, seed=23)
    posteriors = posteriors * (rule_priors > 0)  # a class of prior 0 has posterior 0 everywhere
    posteriors /= posteriors.sum(axis=1, keepdims=True)
    estimate = estimate_priors_from_posteriors(posteriors, rule_priors, CLASSES)
    shown = re.search(r"\(chi-squared, (\d+) degrees of freedom\)", render_priors(estimate, "text"))
    assert shown is not None and int(shown.group(1)) == active - 1
    assert estimate.p_value == pytest.approx(stats.chi2.sf(estimate.change_statistic, int(shown.group(1))), rel=1e-9)


@settings(max_examples=200, deadline=None)
@given(st.lists(st.one_of(st.just(0.0), st.floats(1e-3, 1.0)), min_size=2, max_size=6).filter(lambda w: sum(w) > 0))
def test_the_pasted_priors_round_to_four_decimals_and_give_the_remainder_to_the_largest_class(
    weights: list[float],
) -> None:
    # The block to paste states each prior in 4 decimals (the report's stated precision, CHANGES.md: "rounded,
    # summing to 1"); every class keeps its own rounding except one class of largest rounded estimate, which takes
    # the remainder, so a class the rule rules out (estimate 0) stays 0. A law for every mix; no source.
    priors = np.array(weights) / sum(weights)
    names = tuple(f"c{k}" for k in range(priors.size))
    estimate = dataclasses.replace(_any_estimate(priors.size), classes=names, priors=priors)
    pasted = np.array(list(rounded_priors(estimate).values()))
    own = np.round(priors, 4)
    assert np.all(np.round(pasted, 4) == pasted)  # no more than 4 decimals
    assert abs(pasted.sum() - 1.0) < 1e-12
    adjusted = np.flatnonzero(pasted != own)
    assert adjusted.size <= 1 and all(own[k] == own.max() for k in adjusted)
    assert np.all(pasted[priors == 0.0] == 0.0)
    assert np.all(np.abs(pasted - priors) <= priors.size * 0.5e-4 + 1e-12)


def _any_estimate(n_classes: int) -> PriorEstimate:
    """An estimate to vary with dataclasses.replace: its classes, priors and intervals are replaced or unread."""
    rule_priors = np.full(n_classes, 1 / n_classes)
    posteriors = np.tile(rule_priors, (4, 1))
    return estimate_priors_from_posteriors(posteriors, rule_priors, tuple(f"c{k}" for k in range(n_classes)))
