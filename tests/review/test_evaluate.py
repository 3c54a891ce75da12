"""`policyc evaluate`: risk, errors, rejects, confusion, the risk-reject curve and calibration.

Outside checks name their source beside the assertion: a hand-computed table, Chow's error-reject
trade-off (references.md CH-3) and its closed form for two Gaussians (references.md CH-5, recomputed
with scipy.stats.norm), and scikit-learn's calibration_curve for the reliability table.
"""

from __future__ import annotations

import csv
import json
import textwrap
from pathlib import Path
from types import SimpleNamespace
from typing import cast

import numpy as np
import pyarrow as pa
import pyarrow.parquet as pq
import pytest
import scipy.stats
from click.testing import CliRunner
from sklearn.calibration import calibration_curve

from policyc.cli import main
from policyc.evidence.partitions import SerialPartitions
from policyc.review.evaluate.evaluation import ECE_WARNING, CalibrationReport, evaluate, limit_checks
from policyc.review.evaluate.render import render_evaluation
from policyc.review.shared.loading import load_rule_or_policy
from policyc.runtime import Rule

ROOT = Path(__file__).resolve().parents[2]
CLAIMS = ROOT / "policies-demo" / "claims"
PACKHOUSE = ROOT / "policies-demo" / "packhouse"

# Hand-computed: two classes, q = P(bad | x) given directly (trained priors = deployment priors, so the
# prior correction leaves q unchanged). R(accept) = 10 q, R(decline) = 1 - q, R(hold) = 0.8:
# accept for q <= 0.08, hold for 0.08 < q < 0.2, decline for q >= 0.2.
HAND_POLICY = """\
policy: hand-computed
revision: 1
classes: [ok, bad]
priors: {ok: 0.7, bad: 0.3}
actions: [accept, decline]
loss_unit: EUR per case
loss:
  accept: {ok: 0, bad: 10}
  decline: {ok: 1, bad: 0}
reject: {action: hold, cost: 0.8}
evidence:
  kind: posterior
  columns: {ok: p_ok, bad: p_bad}
  trained_priors: {ok: 0.7, bad: 0.3}
  calibration: {method: none}
"""
# (q, true class) -> decision, loss
HAND_ROWS = [
    (0.01, "ok"),  # accept, 0
    (0.05, "bad"),  # accept, 10 (error)
    (0.10, "ok"),  # hold, 0.8
    (0.15, "bad"),  # hold, 0.8
    (0.50, "bad"),  # decline, 0
    (0.90, "ok"),  # decline, 1 (error)
    (0.02, "ok"),  # accept, 0
    (0.30, "bad"),  # decline, 0
]


@pytest.fixture
def hand(tmp_path: Path) -> tuple[Path, Path]:
    policy = tmp_path / "hand.yaml"
    policy.write_text(HAND_POLICY, encoding="utf-8")
    data = tmp_path / "hand.csv"
    with data.open("w", newline="", encoding="utf-8") as handle:
        writer = csv.writer(handle)
        writer.writerow(["p_ok", "p_bad", "truth"])
        writer.writerows([[f"{1 - q:.2f}", f"{q:.2f}", label] for q, label in HAND_ROWS])
    return policy, data


def test_hand_computed_confusion_risk_and_rates(hand: tuple[Path, Path]) -> None:
    policy, data = hand
    result = evaluate(load_rule_or_policy(policy), data, "truth", batch_rows=3)
    # hand-computed: rows = true class (ok, bad), columns = action (accept, decline, hold)
    assert result.confusion.tolist() == [[2, 1, 1], [1, 2, 1]]
    assert result.risk.estimate == pytest.approx((10 + 0.8 + 0.8 + 1) / 8, abs=1e-12)  # hand-computed: 12.6 / 8
    assert result.reject_rate == pytest.approx(2 / 8, abs=1e-12)  # hand-computed
    assert result.error_rate == pytest.approx(2 / 8, abs=1e-12)  # hand-computed: errors among all rows
    assert result.accepted_error_rate == pytest.approx(2 / 6, abs=1e-12)  # hand-computed: errors among accepted
    assert result.errors_by_class.tolist() == [1, 1]  # hand-computed: one ok declined, one bad accepted
    own = next(p for p in result.curve if p.own)
    assert (own.reject_cost, own.risk, own.reject_rate, own.error_rate) == pytest.approx(
        (0.8, result.risk.estimate, result.reject_rate, result.error_rate), abs=1e-12
    )
    assert result.risk.low <= result.risk.estimate <= result.risk.high
    # V = c01 c10 / (c01 + c10) for a zero-diagonal 2x2 loss = 10 / 11 (references.md CH-6)
    assert result.reach_value == pytest.approx(10 / 11, abs=1e-9)


def test_cli_reports_and_json_shape(hand: tuple[Path, Path]) -> None:
    policy, data = hand
    result = CliRunner().invoke(main, ["evaluate", str(policy), str(data), "--label", "truth", "--format", "json"])
    assert result.exit_code == 0, result.output
    report = json.loads(result.stdout)
    assert report["confusion"]["counts"] == [[2, 1, 1], [1, 2, 1]]  # hand-computed
    assert report["per_class"][0]["action_shares"] == {"accept": 0.5, "decline": 0.25, "hold": 0.25}
    assert report["calibration"]["warning"] is True  # eight rows cannot be calibrated
    for output_format in ("text", "markdown"):
        shown = CliRunner().invoke(
            main, ["evaluate", str(policy), str(data), "--label", "truth", "--format", output_format]
        )
        assert shown.exit_code == 0 and "WARNING: expected calibration error above 0.05" in shown.stdout
        assert "1.575" in shown.stdout and "EUR per case" in shown.stdout


def test_unknown_label_names_the_row(hand: tuple[Path, Path]) -> None:
    policy, data = hand
    lines = data.read_text(encoding="utf-8").splitlines()
    lines[4] = lines[4].replace("bad", "maybe")  # data row 4
    data.write_text("\n".join(lines) + "\n", encoding="utf-8")
    result = CliRunner().invoke(main, ["evaluate", str(policy), str(data), "--label", "truth"])
    assert result.exit_code == 1
    assert "column 'truth', row 4: label 'maybe' is not a class of the rule (ok, bad)" in result.stderr


def test_the_risk_reject_curve_is_monotone_as_chow_states() -> None:
    for policy, data, label in [
        (PACKHOUSE / "policy.yaml", PACKHOUSE / "holdout.csv", "grade"),
        (CLAIMS / "policy.yaml", CLAIMS / "holdout.csv", "outcome"),
    ]:
        result = evaluate(load_rule_or_policy(policy), data, label, curve_points=61)
        reject = np.array([p.reject_rate for p in result.curve])
        error = np.array([p.error_rate for p in result.curve])
        # Chow 1970 / Fukunaga p. 78 (references.md CH-3): as the reject threshold rises the reject rate
        # falls from 1 and the error rate rises; the accepted sets are nested, so this holds exactly
        assert reject[0] == 1.0 and error[0] == 0.0 and reject[-1] == 0.0
        assert (np.diff(reject) <= 0).all() and (np.diff(error) >= 0).all()
        assert result.curve[-1].error_rate == pytest.approx(result.curve[-1].accepted_error_rate)


def chow_closed_form(t: float, p1: float = 0.3, delta: float = 2.0) -> tuple[float, float]:
    """E and R of Chow's rule for N(0,1) vs N(delta,1), 0-1 loss (references.md CH-5), with scipy.stats.norm.

    L = ln p1(x)/p2(x) is N(Δ²/2, Δ²) under class 1 and N(-Δ²/2, Δ²) under class 2; accept class 1 iff
    L + b >= a, class 2 iff L + b <= -a, else reject; b = ln(P1/P2), a = ln((1-t)/t).
    """
    p2 = 1.0 - p1
    b, a = np.log(p1 / p2), np.log((1.0 - t) / t)
    mean, sd = delta**2 / 2.0, delta
    under_1, under_2 = scipy.stats.norm(mean, sd), scipy.stats.norm(-mean, sd)
    error = p1 * under_1.cdf(-a - b) + p2 * under_2.sf(a - b)
    reject = p1 * (under_1.cdf(a - b) - under_1.cdf(-a - b)) + p2 * (under_2.cdf(a - b) - under_2.cdf(-a - b))
    return float(error), float(reject)


@pytest.mark.parametrize(
    ("t", "table_error", "table_reject"),
    # references.md CH-5 table values (E = error among all samples, R = reject rate)
    [(0.1, 0.0181723, 0.4524081), (0.2, 0.0426365, 0.2840895), (0.3, 0.0702430, 0.1726107)],
)
def test_closed_form_recomputed_matches_the_table(t: float, table_error: float, table_reject: float) -> None:
    error, reject = chow_closed_form(t)
    assert error == pytest.approx(table_error, abs=1e-6)  # references.md CH-5
    assert reject == pytest.approx(table_reject, abs=1e-6)  # references.md CH-5


def test_error_and_reject_rates_match_chows_closed_form_for_two_gaussians(tmp_path: Path) -> None:
    n = 100_000  # E at t = 0.1 has a standard error of sqrt(0.018 * 0.982 / n) ≈ 4.2e-4
    rng = np.random.default_rng(20240611)
    first = rng.random(n) < 0.3
    x = np.where(first, rng.normal(0.0, 1.0, n), rng.normal(2.0, 1.0, n))
    table = pa.table(
        {
            "ll_one": scipy.stats.norm.logpdf(x, 0.0, 1.0),
            "ll_two": scipy.stats.norm.logpdf(x, 2.0, 1.0),
            "truth": np.where(first, "one", "two"),
        }
    )
    pq.write_table(table, tmp_path / "sample.parquet")
    policy = tmp_path / "chow.yaml"
    policy.write_text(
        textwrap.dedent(
            """\
            policy: chow-two-gaussians
            classes: [one, two]
            priors: {one: 0.3, two: 0.7}
            actions: [say_one, say_two]
            loss:
              say_one: {one: 0, two: 1}
              say_two: {one: 1, two: 0}
            reject: {action: reject, cost: 0.2}
            evidence: {kind: log-likelihood, columns: {one: ll_one, two: ll_two}}
            """
        ),
        encoding="utf-8",
    )
    result = evaluate(load_rule_or_policy(policy), tmp_path / "sample.parquet", "truth", extra_costs=(0.1, 0.3))
    points = {p.reject_cost: p for p in result.curve}
    for t in (0.1, 0.2, 0.3):
        error, reject = chow_closed_form(t)  # references.md CH-5, recomputed with scipy.stats.norm
        measured = points[t]
        assert abs(measured.error_rate - error) <= 3.0 * np.sqrt(error * (1 - error) / n)
        assert abs(measured.reject_rate - reject) <= 3.0 * np.sqrt(reject * (1 - reject) / n)
    assert result.reach_value == pytest.approx(0.5, abs=1e-9)  # V = (K - 1)/K under 0-1 loss (references.md CH-2)


def test_calibration_table_is_sklearns_on_the_corrected_posteriors() -> None:
    loaded = load_rule_or_policy(CLAIMS / "policy.yaml")
    result = evaluate(loaded, CLAIMS / "holdout.csv", "outcome", batch_rows=700)
    assert result.calibration is not None
    with (CLAIMS / "holdout.csv").open(newline="", encoding="utf-8") as handle:
        rows = list(csv.DictReader(handle))
    X = np.array([[float(row[f]) for f in loaded.rule.features] for row in rows])
    fraud = np.array([row["outcome"] == "fraudulent" for row in rows])
    corrected = loaded.rule.posteriors(X)[:, 1]  # the upstream probabilities corrected to the deployment priors
    # scikit-learn calibration_curve, 10 uniform bins (its bins are right-closed, like ours)
    observed, predicted = calibration_curve(fraud, corrected, n_bins=10, strategy="uniform")
    table = result.calibration.tables[1]
    assert np.allclose([b.observed for b in table], observed, rtol=0, atol=1e-12)
    assert np.allclose([b.mean_predicted for b in table], predicted, rtol=0, atol=1e-12)
    counts = np.array([b.count for b in table])
    # ECE = Σ_b (n_b / N) |observed_b - predicted_b| over scikit-learn's bins
    assert result.calibration.ece[1] == pytest.approx(float(np.sum(counts * np.abs(observed - predicted)) / len(rows)))
    raw = np.array([float(row["p_fraudulent"]) for row in rows])
    assert not np.allclose(calibration_curve(fraud, raw, n_bins=10)[1], predicted)  # the raw scores are not used


def test_a_curve_picture_is_written(hand: tuple[Path, Path], tmp_path: Path) -> None:
    policy, data = hand
    picture = tmp_path / "curve.png"
    result = CliRunner().invoke(
        main, ["evaluate", str(policy), str(data), "--label", "truth", "--plot-curve", str(picture)]
    )
    assert result.exit_code == 0 and picture.stat().st_size > 1000


def test_deferrals_are_counted_by_reason(hand: tuple[Path, Path], tmp_path: Path) -> None:
    policy, data = hand
    text = policy.read_text(encoding="utf-8") + "invalid_input: reject\n"
    policy.write_text(text, encoding="utf-8")
    with data.open("a", encoding="utf-8") as handle:
        handle.write("nan,0.5,ok\n0.3,0.3,bad\n")  # NaN, and probabilities summing to 0.6: both invalid
    result = evaluate(load_rule_or_policy(policy), data, "truth")
    # hand-computed: the two rows held at q = 0.10 and 0.15 by risk, the two appended rows as invalid
    assert result.deferred == {"min-risk": 2, "novelty": 0, "invalid": 2}
    assert sum(result.deferred.values()) == result.rejected
    shown = CliRunner().invoke(main, ["evaluate", str(policy), str(data), "--label", "truth"])
    assert "(hold; min-risk 2, novelty 0, invalid 2)" in shown.stdout
    report = json.loads(
        CliRunner().invoke(main, ["evaluate", str(policy), str(data), "--label", "truth", "--format", "json"]).stdout
    )
    assert report["deferred_by_reason"] == {"min-risk": 2, "novelty": 0, "invalid": 2}


R6 = Path(__file__).resolve().parents[2] / "policies-demo" / "packhouse" / "policy-r6.yaml"
HOLDOUT = R6.parent / "holdout.csv"


def test_limits_on_hold_out_data_match_an_independent_count() -> None:
    """Each limit's hold-out rate from the rule's own decisions, its interval against scipy's beta quantiles
    (Clopper & Pearson 1934, from memory: exact binomial interval), and the risk by the STATED matrix."""
    loaded = load_rule_or_policy(R6)
    rule = loaded.rule
    result = evaluate(loaded, HOLDOUT, "grade", confidence=0.9, resamples=200)
    with HOLDOUT.open(newline="", encoding="utf-8") as handle:
        rows = list(csv.DictReader(handle))
    X = np.array([[float(r[f]) for f in rule.features] for r in rows])
    labels = np.array([rule.classes.index(r["grade"]) for r in rows])
    decided = rule.decide(X)
    cap, recall = result.limits
    bench = rule.actions.index("hold_for_inspector")
    assert (cap.rows, cap.count) == (len(rows), int(np.sum(decided == bench)))
    defects = decided[labels == rule.classes.index("defect")]
    caught = int(np.isin(defects, [rule.actions.index("juice"), bench]).sum())
    assert (recall.rows, recall.count) == (defects.size, caught)
    x, n = cap.count, cap.rows
    assert cap.low == pytest.approx(scipy.stats.beta.ppf(0.05, x, n - x + 1))
    assert cap.high == pytest.approx(scipy.stats.beta.ppf(0.95, x + 1, n - x))
    assert cap.holds == (x / n <= 0.05) and cap.clearly_broken == (cap.low > 0.05)
    stated = np.array([[rule.manifest["limits"]["stated_loss"][a][c] for c in rule.classes] for a in rule.actions])
    assert not np.array_equal(stated, rule.params["loss"])
    assert result.risk.estimate == pytest.approx(stated[decided, labels].mean())


def test_evaluate_report_lists_the_limits(tmp_path: Path) -> None:
    result = CliRunner().invoke(main, ["evaluate", str(R6), str(HOLDOUT), "--label", "grade", "--format", "json"])
    assert result.exit_code == 0, result.output
    limits = json.loads(result.stdout)["limits"]
    assert [(c["kind"], c["subject"]) for c in limits] == [
        ("max_share", "hold_for_inspector"),
        ("min_recall", "defect"),
    ]
    text = CliRunner().invoke(main, ["evaluate", str(R6), str(HOLDOUT), "--label", "grade"]).stdout
    assert "operating limits on this data" in text and "at most 5.00% get hold_for_inspector" in text


def test_curve_points_off_the_own_cost_are_hand_computed(hand: tuple[Path, Path]) -> None:
    # Chow's rule at cost c: accept argmin R(a|x) when min_a R(a|x) <= c. Plain-action minimum risks of the
    # eight rows, min(10q, 1 - q): 0.1, 0.5, 0.9, 0.85, 0.5, 0.1, 0.2, 0.7 (hand-computed).
    policy, data = hand
    result = evaluate(load_rule_or_policy(policy), data, "truth", extra_costs=(0.45,))
    at = {p.reject_cost: p for p in result.curve}
    # c = 0.45: rows q = 0.01, 0.9, 0.02 are accepted (the 0.9 row is an ok declined: one error), five deferred
    point = at[0.45]
    assert (point.risk, point.reject_rate, point.error_rate) == pytest.approx((3.25 / 8, 5 / 8, 1 / 8), abs=1e-12)
    assert point.accepted_error_rate == pytest.approx(1 / 3, abs=1e-12)  # errors / accepted rows
    # c = 0: everything is deferred, so no accepted row has an error rate
    assert (at[0.0].reject_rate, at[0.0].error_rate, at[0.0].risk) == (1.0, 0.0, 0.0)
    assert np.isnan(at[0.0].accepted_error_rate)


def test_everything_deferred_has_no_accepted_error_rate(hand: tuple[Path, Path]) -> None:
    policy, data = hand
    policy.write_text(HAND_POLICY.replace("cost: 0.8", "cost: 0.001"), encoding="utf-8")
    result = evaluate(load_rule_or_policy(policy), data, "truth")
    assert result.reject_rate == 1.0 and result.error_rate == 0.0
    assert np.isnan(result.accepted_error_rate)
    assert result.risk.estimate == pytest.approx(0.001, abs=1e-15)


def test_per_class_error_rates_and_invalid_rows_are_counted(hand: tuple[Path, Path]) -> None:
    policy, data = hand
    policy.write_text(HAND_POLICY + "invalid_input: reject\n", encoding="utf-8")
    with data.open("a", encoding="utf-8") as handle:
        handle.write("nan,0.5,ok\ninf,0.5,bad\n")
    result = evaluate(load_rule_or_policy(policy), data, "truth")
    assert result.invalid_rows == 2
    # hand-computed: ok has 5 rows (one declined: an error), bad has 5 rows (one accepted: an error)
    assert [entry.rows for entry in result.per_class] == [5, 5]
    assert [entry.error_rate for entry in result.per_class] == pytest.approx([1 / 5, 1 / 5], abs=1e-12)


def test_a_tie_at_the_reject_cost_is_accepted_as_chow_states(hand: tuple[Path, Path]) -> None:
    # Chow 1970 (references.md CH-1): accept iff max posterior >= 1 - t, i.e. iff the least risk is at most the
    # reject cost. Sweeping the curve exactly through each row's least risk puts that row on the boundary.
    policy, data = hand
    loaded = load_rule_or_policy(policy)
    posteriors = np.array([[float(f"{1 - q:.2f}"), float(f"{q:.2f}")] for q, _ in HAND_ROWS])  # as in the file
    least = loaded.rule.risks(posteriors)[:, :2].min(axis=1)
    result = evaluate(loaded, data, "truth", extra_costs=tuple(least.tolist()))
    at = {p.reject_cost: p for p in result.curve}
    for cost in least:
        assert at[cost].reject_rate == np.count_nonzero(least > cost) / len(HAND_ROWS)


def test_limits_at_their_boundaries_match_scipys_clopper_pearson() -> None:
    rule = load_rule_or_policy(R6).rule  # max_share hold_for_inspector 0.05, min_recall defect 0.99 by juice or hold
    # rows: true class (premium, standard, defect); columns: pack_premium, pack_standard, juice, hold_for_inspector.
    # Expected (holds, clearly broken) of the cap and the recall: a rate exactly at its limit still holds; a limit
    # is clearly broken only when the whole interval lies beyond it (hand-checked against the intervals).
    cases = [
        ([[91, 0, 0, 9], [0, 0, 0, 0], [0, 1, 98, 1]], [(True, False), (True, False)]),  # 10/200 held, 99/100 caught
        ([[20, 0, 0, 0], [0, 0, 0, 0], [0, 0, 5, 0]], [(True, False), (True, False)]),  # none held, all caught
        ([[10, 0, 0, 10], [0, 0, 0, 0], [0, 9, 1, 0]], [(False, True), (False, True)]),  # 10/30 held, 1/10 caught
    ]
    for counts, verdicts in cases:
        confusion = np.array(counts)
        checks = limit_checks(rule, confusion, 0.9)
        judged = [
            (int(confusion.sum()), int(confusion[:, 3].sum())),
            (int(confusion[2].sum()), int(confusion[2, 2:].sum())),
        ]
        for check, (rows, count), verdict in zip(checks, judged, verdicts, strict=True):
            # Clopper & Pearson 1934 exact interval as scipy.stats.binomtest computes it (low 0 at no success,
            # high 1 at all successes)
            exact = scipy.stats.binomtest(count, rows).proportion_ci(confidence_level=0.9, method="exact")
            assert (check.rows, check.count, check.rate) == (rows, count, count / rows), counts
            assert (check.low, check.high) == pytest.approx((exact.low, exact.high), abs=1e-12), counts
            assert (check.holds, check.clearly_broken) == verdict, counts


def test_an_interval_touching_the_limit_is_not_clearly_broken() -> None:
    rule = load_rule_or_policy(R6).rule
    confusion = np.array([[91, 0, 0, 9], [0, 0, 0, 0], [0, 1, 98, 1]])
    cap, recall = limit_checks(rule, confusion, 0.9)
    # the same limits moved onto the interval's near end: the limit is inside the closed interval
    limits = [
        {**figures, "share": edge}
        for figures, edge in zip(rule.manifest["limits"]["limits"], (cap.low, recall.high), strict=True)
    ]
    touching = SimpleNamespace(manifest={"limits": {"limits": limits}}, actions=rule.actions, classes=rule.classes)
    assert [c.clearly_broken for c in limit_checks(cast(Rule, touching), confusion, 0.9)] == [False, False]


def test_calibration_warns_only_above_the_threshold_and_on_any_class() -> None:
    # ECE_WARNING: warn when a class's expected calibration error exceeds 0.05 (common practice, no source)
    assert not CalibrationReport(("a", "b"), ((), ()), (0.01, ECE_WARNING)).warning
    assert CalibrationReport(("a", "b"), ((), ()), (0.01, 0.2)).warning
    assert CalibrationReport(("a", "b"), ((), ()), (0.2, 0.01)).warning


def test_reliability_bins_are_tenths_holding_their_mean_prediction() -> None:
    result = evaluate(load_rule_or_policy(CLAIMS / "policy.yaml"), CLAIMS / "holdout.csv", "outcome")
    assert result.calibration is not None
    for table in result.calibration.tables:
        # equal-width right-closed bins (lo, hi] of width 1/10, as scikit-learn's calibration_curve uses
        for reliability in table:
            assert reliability.high - reliability.low == pytest.approx(0.1, abs=1e-12)
            assert reliability.low <= reliability.mean_predicted <= reliability.high


# Hand-computed, two classes and three actions, no reject option: R(accept) = 10 q, R(investigate) = 1 + q,
# R(decline) = 3 - 3 q, so accept for q <= 1/9, investigate up to q = 1/2, decline above. V = max_q min_a R = 1.5
# at q = 1/2 (references.md CH-6).
THREE_ACTIONS = """\
policy: three-actions
revision: 1
classes: [ok, bad]
priors: {ok: 0.7, bad: 0.3}
actions: [accept, investigate, decline]
loss:
  accept: {ok: 0, bad: 10}
  investigate: {ok: 1, bad: 2}
  decline: {ok: 3, bad: 0}
evidence:
  kind: posterior
  columns: {ok: p_ok, bad: p_bad}
  trained_priors: {ok: 0.7, bad: 0.3}
  calibration: {method: none}
"""
# (q, true class): accept 10 (error), accept 0, investigate 1 (error), investigate 2 (error), decline 3 (error),
# decline 0. An error is a loss above the least loss of the true class: 0 for both classes.
THREE_ACTION_ROWS = [(0.02, "bad"), (0.05, "ok"), (0.3, "ok"), (0.3, "bad"), (0.8, "ok"), (0.8, "bad")]


def write_rows(path: Path, rows: list[tuple[float, str]]) -> Path:
    with path.open("w", newline="", encoding="utf-8") as handle:
        writer = csv.writer(handle)
        writer.writerow(["p_ok", "p_bad", "truth"])
        writer.writerows([[f"{1 - q:.2f}", f"{q:.2f}", label] for q, label in rows])
    return path


def test_a_rule_without_reject_option_with_more_actions_than_classes(tmp_path: Path) -> None:
    policy = tmp_path / "three.yaml"
    policy.write_text(THREE_ACTIONS, encoding="utf-8")
    data = write_rows(tmp_path / "three.csv", THREE_ACTION_ROWS)
    result = evaluate(load_rule_or_policy(policy), data, "truth", extra_costs=(0.3,))
    assert result.confusion.tolist() == [[1, 1, 1], [1, 1, 1]]  # hand-computed
    assert (result.risk.estimate, result.reject_rate) == pytest.approx((16 / 6, 0.0), abs=1e-12)  # hand-computed
    assert (result.error_rate, result.accepted_error_rate) == pytest.approx((4 / 6, 4 / 6), abs=1e-12)
    assert result.reach_value == pytest.approx(1.5, abs=1e-9)  # hand-computed V (references.md CH-6)
    # at c = V deferring is never chosen (references.md CH-6): the curve's last point is the rule itself
    last = result.curve[-1]
    assert (last.reject_cost, last.risk, last.reject_rate, last.error_rate) == pytest.approx(
        (1.5, 16 / 6, 0.0, 4 / 6), abs=1e-12
    )
    # c = 0.3: only the q = 0.02 row (least risk 0.2) is accepted, and it is an error (hand-computed)
    single = next(p for p in result.curve if p.reject_cost == 0.3)
    assert (single.risk, single.reject_rate, single.accepted_error_rate) == pytest.approx(
        ((10 + 5 * 0.3) / 6, 5 / 6, 1.0), abs=1e-12
    )


def test_a_file_of_one_row_is_evaluated(hand: tuple[Path, Path], tmp_path: Path) -> None:
    policy, _ = hand
    data = write_rows(tmp_path / "one.csv", [(0.9, "ok")])  # declined, loss 1: an error (hand-computed)
    result = evaluate(load_rule_or_policy(policy), data, "truth")
    assert (result.rows, result.risk.estimate, result.error_rate) == (1, 1.0, 1.0)


def test_the_cli_report_is_the_librarys_default_report(hand: tuple[Path, Path]) -> None:
    # the command is plumbing: by default it reports what evaluate() computes by default
    policy, data = hand
    shown = CliRunner().invoke(main, ["evaluate", str(policy), str(data), "--label", "truth", "--format", "json"])
    assert json.loads(shown.stdout) == json.loads(
        render_evaluation(evaluate(load_rule_or_policy(policy), data, "truth"), "json")
    )


def test_invalid_rows_spread_over_files_are_counted_once_each(hand: tuple[Path, Path], tmp_path: Path) -> None:
    policy, data = hand
    policy.write_text(HAND_POLICY + "invalid_input: reject\n", encoding="utf-8")
    header, *rows = data.read_text(encoding="utf-8").splitlines()
    parts = tmp_path / "parts"
    parts.mkdir()
    # each half of the hand rows with one invalid row: a NaN, and probabilities summing to 0.6
    for name, half, invalid in [("a.csv", rows[:4], "nan,0.5,ok"), ("b.csv", rows[4:], "0.3,0.3,bad")]:
        (parts / name).write_text("\n".join([header, *half, invalid]) + "\n", encoding="utf-8")
    result = evaluate(load_rule_or_policy(policy), parts, "truth")
    # hand-computed: the rows held at q = 0.10 and 0.15 by risk, one invalid row per file
    assert (result.rows, result.invalid_rows) == (10, 2)
    assert result.deferred == {"min-risk": 2, "novelty": 0, "invalid": 2}


def test_progress_counts_every_row_once(hand: tuple[Path, Path]) -> None:
    policy, data = hand
    reported: list[int] = []
    progress = SerialPartitions(progress=lambda rows, total, stage="": reported.append(rows))
    evaluate(load_rule_or_policy(policy), data, "truth", batch_rows=3, partitions=progress)
    assert sum(reported) == len(HAND_ROWS)
