"""Operating limits against outside references: Chow's reject rate (CH-5, LIM-3), the Neyman–Pearson boundary
(LIM-1), the umbrella algorithm's high-probability guarantee (LIM-2), prices as differences of risks (LIM-4),
and decisions against a brute-force argmin of the adjusted risks."""

from __future__ import annotations

import json
from pathlib import Path

import numpy as np
import pytest
from helpers import compile_text, loglik_evidence, policy_text, posterior_evidence
from scipy import stats

from policyc.compiler.limits import ReferenceSample, limits_from_policy, solve_limits
from policyc.language.model import build_policy
from policyc.language.source import parse_source

# CH-5 / LIM-3: N(0, 1) = c0 vs N(2, 1) = c1, priors (0.3, 0.7), 0-1 loss (references.md, derived)
PRIORS = np.array([0.3, 0.7])
MEANS = np.array([0.0, 2.0])


def chow_reject_rate(t: float) -> float:
    """R(t) of CH-5: L = ln p1/p2 ~ N(±Δ²/2, Δ²) under c0/c1, reject iff -a < L + b < a, a = ln((1-t)/t)."""
    a, b, delta = np.log((1.0 - t) / t), np.log(PRIORS[0] / PRIORS[1]), 2.0
    rate = 0.0
    for prior, centre in zip(PRIORS, (delta**2 / 2, -(delta**2) / 2), strict=True):
        # P(-a - b < L < a - b) under L ~ N(centre, Δ²)
        rate += prior * (stats.norm.cdf((a - b - centre) / delta) - stats.norm.cdf((-a - b - centre) / delta))
    return float(rate)


def write_columns(path: Path, columns: dict[str, np.ndarray]) -> None:
    header = ",".join(columns)
    body = np.column_stack([np.asarray(v, dtype=object) for v in columns.values()])
    with path.open("w", encoding="utf-8") as handle:
        handle.write(header + "\n")
        handle.writelines(",".join(str(cell) for cell in row) + "\n" for row in body)


def two_gaussian_sample(rng: np.random.Generator, n: int) -> tuple[np.ndarray, np.ndarray]:
    labels = (rng.random(n) < PRIORS[1]).astype(int)
    return rng.normal(MEANS[labels], 1.0), labels


def chow_policy(tmp_path: Path, cap: float, confidence: float, n: int = 100_000) -> str:
    x, labels = two_gaussian_sample(np.random.default_rng(7), n)
    columns = {f"ll_c{k}": stats.norm.logpdf(x, MEANS[k], 1.0) for k in range(2)}
    write_columns(tmp_path / "reference.csv", {**columns, "grade": np.array(["c0", "c1"])[labels]})
    text = policy_text(
        classes=["c0", "c1"],
        priors=PRIORS,
        actions=["a0", "a1"],
        loss=1.0 - np.eye(2),
        evidence=loglik_evidence(["c0", "c1"]),
        reject_cost=0.1,
        invalid_input="reject",
    )
    limits = {"data": "reference.csv", "confidence": confidence, "max_share": {"reject": cap}}
    return text + f"limits: {json.dumps(limits)}\n"


def test_reject_cap_reproduces_chows_effective_reject_cost(tmp_path: Path) -> None:
    # LIM-3 (references.md, derived from CH-5): R(0.2) = 0.2840895, so a cap at that rate on a rule with
    # reject cost 0.1 needs the effective reject cost 0.2, i.e. multiplier 0.1.
    cap = chow_reject_rate(0.2)
    assert cap == pytest.approx(0.2840895, abs=1e-7)
    manifest = compile_text(tmp_path, chow_policy(tmp_path, cap, confidence=0.5)).rule.manifest
    (limit,) = manifest["limits"]["limits"]
    # sampling tolerance: 4 standard errors of the reject rate over n rows, through the slope dR/dt at t = 0.2
    slope = (chow_reject_rate(0.201) - chow_reject_rate(0.199)) / 0.002
    tolerance = 4 * np.sqrt(cap * (1 - cap) / limit["rows"]) / abs(slope)
    print(f"multiplier {limit['multiplier']:.5f} (closed form 0.1, tolerance {tolerance:.5f})")
    assert limit["multiplier"] == pytest.approx(0.1, abs=tolerance)
    assert manifest["limits"]["adjusted_loss"]["reject"]["c0"] == pytest.approx(0.2, abs=tolerance)
    assert limit["rate"] <= cap


def test_a_reject_cap_already_met_changes_nothing(tmp_path: Path) -> None:
    # Reject rate at t = 0.1 is 0.4524081 (CH-5); a cap of 0.6 is met, so μ = 0 exactly and L' = L.
    compiled = compile_text(tmp_path, chow_policy(tmp_path, 0.6, confidence=0.95, n=20_000))
    record = compiled.rule.manifest["limits"]
    assert record["limits"][0]["multiplier"] == 0.0
    assert record["limits"][0]["price"] == 0.0
    assert record["adjusted_loss"] == record["stated_loss"]
    assert np.array_equal(compiled.rule.params["loss"], np.array([[0.0, 1.0], [1.0, 0.0], [0.1, 0.1]]))


def recall_policy_text(data: str, share: float, confidence: float, evidence: dict[str, object]) -> str:
    text = policy_text(
        classes=["good", "defect"],
        priors=[0.9, 0.1],
        actions=["pass", "discard"],
        loss=np.array([[0.0, 5.0], [1.0, 0.0]]),
        evidence=evidence,
    )
    limits = {"data": data, "label": "grade", "confidence": confidence}
    limits["min_recall"] = {"defect": {"actions": ["discard"], "share": share}}
    return text + f"limits: {json.dumps(limits)}\n"


def test_recall_floor_reproduces_the_neyman_pearson_boundary(tmp_path: Path) -> None:
    # LIM-1 (Neyman & Pearson 1933, from memory; references.md): defect ~ N(2, 1), good ~ N(0, 1); catching
    # a share s of defects puts the boundary at x* = 2 - Φ⁻¹(s) = -0.326348 for s = 0.99.
    share = 0.99
    x_star = 2.0 - stats.norm.ppf(share)
    assert x_star == pytest.approx(-0.326348, abs=1e-6)
    rng = np.random.default_rng(11)
    train_labels = np.repeat([0, 1], 2000)
    write_columns(
        tmp_path / "train.csv",
        {"x": rng.normal(2.0 * train_labels, 1.0), "grade": np.array(["good", "defect"])[train_labels]},
    )
    n_defect = 100_000
    ref_labels = np.repeat([0, 1], [20_000, n_defect])
    write_columns(
        tmp_path / "reference.csv",
        {"x": rng.normal(2.0 * ref_labels, 1.0), "grade": np.array(["good", "defect"])[ref_labels]},
    )
    evidence = {"kind": "gaussian", "covariance": "tied", "features": ["x"]}
    evidence["training"] = {"data": "train.csv", "label": "grade"}
    rule = compile_text(tmp_path, recall_policy_text("reference.csv", share, 0.5, evidence)).rule
    grid = np.linspace(-2.0, 2.0, 400_001)[:, None]
    discard = rule.decide(grid) == 1
    boundary = float(grid[np.argmax(discard), 0])
    assert discard[np.argmax(discard) :].all()  # one threshold: discard to its right
    # sampling tolerance: 4 standard errors of the empirical s-quantile, √(s(1-s)/n) / φ(x* - 2)
    tolerance = 4 * np.sqrt(share * (1 - share) / n_defect) / stats.norm.pdf(x_star - 2.0)
    print(f"boundary {boundary:.4f}, x* {x_star:.4f}, tolerance {tolerance:.4f}")
    assert boundary == pytest.approx(x_star, abs=tolerance)
    fresh_recall = 1.0 - stats.norm.cdf(boundary - 2.0)
    assert fresh_recall >= share - 3 * np.sqrt(share * (1 - share) / n_defect)


def test_guarantee_holds_on_new_data_where_the_naive_rule_fails_half_the_time() -> None:
    # LIM-2 (Tong, Feng & Li 2018, umbrella algorithm): over many independent reference samples with 300
    # rows of the limited class, the solved rule breaks the limit on new data in at most 1 - confidence of
    # them (binomial tolerance); the empirical threshold (exactly s of the sample caught) breaks it about
    # half the time. New-data recall is exact here: 1 - Φ(x_b - 2) for the rule's boundary x_b.
    share, confidence, n_class, repetitions = 0.9, 0.95, 300, 400
    policy = build_policy(parse_source(recall_policy_text("r.csv", share, confidence, loglik_evidence(["a", "b"]))))
    limits = limits_from_policy(policy, policy.actions)
    stated = policy.loss_matrix()
    rng = np.random.default_rng(2018)
    broken_solved = broken_naive = 0
    for _ in range(repetitions):
        labels = np.repeat([0, 1], n_class)
        x = rng.normal(2.0 * labels, 1.0)
        # P(defect | x) = σ(ln(0.1/0.9) + 2x - 2)  (equal-variance Gaussians, unit variance)
        p_defect = 1.0 / (1.0 + np.exp(-(np.log(0.1 / 0.9) + 2.0 * x - 2.0)))
        sample = ReferenceSample(
            "r.csv",
            "0" * 64,
            np.column_stack([1 - p_defect, p_defect]),
            np.ones(x.size, bool),
            np.zeros(x.size, bool),
            labels,
        )
        solved = solve_limits(stated, limits, sample, confidence, "grade")
        adjusted = solved.adjusted_loss
        # discard iff (1-p)·L'[discard, good] < p·L'[pass, defect]  ⟺  x > x_b
        threshold_odds = adjusted[1, 0] / adjusted[0, 1]
        x_solved = (np.log(threshold_odds) - np.log(0.1 / 0.9) + 2.0) / 2.0
        broken_solved += 1.0 - stats.norm.cdf(x_solved - 2.0) < share
        # naive: the empirical threshold leaving floor((1 - s) n) of the sample's defects uncaught
        defects = np.sort(x[labels == 1])
        x_naive = defects[int(np.floor((1 - share) * n_class))]
        broken_naive += 1.0 - stats.norm.cdf(x_naive - 2.0) < share
    solved_rate, naive_rate = broken_solved / repetitions, broken_naive / repetitions
    allowed = 1 - confidence
    tolerance = 3 * np.sqrt(allowed * (1 - allowed) / repetitions)
    print(
        f"limit broken on new data: solved {solved_rate:.3f} (allowed {allowed:.2f} + {tolerance:.3f}), "
        f"naive {naive_rate:.3f}"
    )
    assert solved_rate <= allowed + tolerance
    assert 0.35 <= naive_rate <= 0.75


def three_class_sample(rng: np.random.Generator, n: int) -> tuple[np.ndarray, np.ndarray]:
    """Posteriors of three classes (Dirichlet draws) and labels drawn from them, so the posteriors are calibrated."""
    posteriors = rng.dirichlet([0.7, 0.7, 0.7], size=n)
    labels = (rng.random(n)[:, None] > np.cumsum(posteriors, axis=1)).sum(axis=1)
    return posteriors, labels


CLASSES = ["premium", "standard", "defect"]
ACTIONS = ["pack_premium", "pack_standard", "juice"]
LOSS = np.array([[0.0, 4.0, 30.0], [2.0, 0.0, 20.0], [6.0, 3.0, 1.0]])
REJECT_COST = 2.5


def limited_posterior_rule(tmp_path: Path) -> tuple[object, np.ndarray, np.ndarray]:
    posteriors, labels = three_class_sample(np.random.default_rng(5), 20_000)
    columns = {f"p_{c}": posteriors[:, k] for k, c in enumerate(CLASSES)}
    write_columns(tmp_path / "reference.csv", {**columns, "grade": np.array(CLASSES)[labels]})
    priors = [1 / 3, 1 / 3, 1 / 3]  # trained priors = deployment priors: the rule's posteriors are its input
    text = policy_text(
        classes=CLASSES,
        priors=priors,
        actions=ACTIONS,
        loss=LOSS,
        evidence=posterior_evidence(CLASSES, priors),
        reject_cost=REJECT_COST,
        reject_action="hold",
    )
    limits = {
        "data": "reference.csv",
        "label": "grade",
        "max_share": {"hold": 0.05},
        "min_recall": {"defect": {"actions": ["juice", "hold"], "share": 0.97}},
    }
    rule = compile_text(tmp_path, text + f"limits: {json.dumps(limits)}\n").rule
    return rule, posteriors, labels


def patterns() -> dict[str, np.ndarray]:
    """M_j written out from the definitions: a cap adds to its action's whole row (here the reject row);
    a recall floor adds to its class's column in the rows of the actions not listed."""
    cap = np.zeros((4, 3))
    cap[3, :] = 1.0
    recall = np.zeros((4, 3))
    recall[[0, 1], 2] = 1.0
    return {"max_share": cap, "min_recall": recall}


def expected_loss(posteriors: np.ndarray, loss: np.ndarray, decided_with: np.ndarray) -> float:
    """Mean over rows of R(a|x) = Σ_k L[a, k] P(k|x), R from ``loss``, a = argmin of P @ decided_with.T."""
    choice = np.argmin(posteriors @ decided_with.T, axis=1)
    return float((posteriors @ loss.T)[np.arange(len(choice)), choice].mean())


def test_prices_are_the_differences_of_expected_losses(tmp_path: Path) -> None:
    # LIM-4 (Boyd & Vandenberghe 2004, §5.6, from memory): the price is the actual difference in expected
    # loss, limited rule minus unlimited rule, by the stated matrix; it is never negative.
    rule, posteriors, _ = limited_posterior_rule(tmp_path)
    record = rule.manifest["limits"]
    stated = np.vstack([LOSS, np.full(3, REJECT_COST)])
    adjusted = stated + sum(f["multiplier"] * patterns()[f["kind"]] for f in record["limits"])
    unlimited = expected_loss(posteriors, stated, stated)
    assert record["price"] == pytest.approx(expected_loss(posteriors, stated, adjusted) - unlimited, abs=1e-12)
    assert record["price"] > 0.0
    for figures in record["limits"]:
        alone = stated + figures["alone_multiplier"] * patterns()[figures["kind"]]
        assert figures["price"] == pytest.approx(expected_loss(posteriors, stated, alone) - unlimited, abs=1e-12)
        assert figures["price"] >= 0.0
        assert figures["multiplier"] > 0.0


def test_limits_hold_and_decisions_are_the_argmin_of_the_adjusted_risks(tmp_path: Path) -> None:
    rule, posteriors, labels = limited_posterior_rule(tmp_path)
    record = rule.manifest["limits"]
    stated = np.vstack([LOSS, np.full(3, REJECT_COST)])
    adjusted = stated + sum(f["multiplier"] * patterns()[f["kind"]] for f in record["limits"])
    assert np.allclose(rule.params["loss"], adjusted, rtol=0, atol=1e-12)
    # brute force: R'(a|x) = Σ_k L'[a, k] P(k|x), argmin (Duda, Hart & Stork 2001, §2.2)
    risks = posteriors @ adjusted.T
    ordered = np.sort(risks, axis=1)
    clear = ordered[:, 1] - ordered[:, 0] > 1e-9
    decided = rule.decide(posteriors)
    assert np.array_equal(decided[clear], np.argmin(risks, axis=1)[clear])
    assert clear.mean() > 0.99
    hold_share = np.mean(decided == 3)
    defect_recall = np.mean(np.isin(decided[labels == 2], [2, 3]))
    cap, recall = record["limits"]
    assert hold_share == pytest.approx(cap["rate"]) and hold_share <= 0.05
    assert defect_recall == pytest.approx(recall["rate"]) and defect_recall >= 0.97
    # the one-sided bounds: Clopper–Pearson at 1 - (1 - 0.95)/2 (Bonferroni over two limits)
    level = record["per_limit_confidence"]
    assert level == pytest.approx(0.975)
    assert cap["bound"] == pytest.approx(stats.beta.ppf(level, cap["count"] + 1, cap["rows"] - cap["count"]))
    assert cap["bound"] <= 0.05 and recall["bound"] >= 0.97
