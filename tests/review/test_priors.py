"""EM estimate of new class priors (Saerens, Latinne & Decaestecker 2002; references.md SA-2..SA-4)."""

from __future__ import annotations

import json
from pathlib import Path

import numpy as np
import pytest
from scipy import optimize, special, stats

from policyc.review.priors import estimate_priors_from_posteriors, render_priors

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
    from policyc.review.priors import render_priors

    uniform = np.full(3, 1 / 3)
    posteriors, _ = _exact_posteriors(uniform, 2000, seed=1)
    estimate = estimate_priors_from_posteriors(posteriors, uniform, CLASSES)
    assert estimate.p_value > 0.05  # the mix did not change, and on this seeded draw the test agrees
    assert 'does not reject "no change" at the 0.05 level' in render_priors(estimate, "text")


def test_rounded_priors_sum_to_one_exactly_in_decimals() -> None:
    from policyc.review.priors import rounded_priors

    posteriors, _ = _exact_posteriors(np.array([1 / 3, 1 / 3, 1 / 3]), 3000, seed=2)
    estimate = estimate_priors_from_posteriors(posteriors, np.array([0.2, 0.3, 0.5]), CLASSES)
    rounded = rounded_priors(estimate)
    assert round(sum(rounded.values()), 10) == 1.0
    assert max(abs(rounded[c] - p) for c, p in zip(CLASSES, estimate.priors, strict=True)) < 2e-4
