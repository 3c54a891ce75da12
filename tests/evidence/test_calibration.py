"""Calibration fitted into the rule: careless and hostile calibration data, and the fit's edge cases.

The reference checks against scipy and scikit-learn are in tests/reference/test_calibration.py.
"""

from __future__ import annotations

import json
from pathlib import Path

import numpy as np
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st
from sklearn.isotonic import IsotonicRegression

from policyc.compiler.build import compile_policy
from policyc.errors import FitProblem
from policyc.evidence.calibration import fit_temperature, isotonic_regression
from policyc.language.diagnostics import CompileError, PolicyError
from policyc.runtime import ArtefactError, Rule, kernel

POLICY = """policy: cal
classes: [ok, bad]
priors: {{ok: 0.9, bad: 0.1}}
actions: [accept, refuse]
loss:
  accept: {{ok: 0, bad: 10}}
  refuse: {{ok: 1, bad: 0}}
reject: {{action: refer, cost: 0.5}}
invalid_input: reject
evidence:
  kind: posterior
  columns: {{ok: p_ok, bad: p_bad}}
  calibrate: {calibrate}
"""


def write_case(tmp_path: Path, rows: list[tuple[float, float, str]], **calibrate: object) -> Path:
    lines = ["p_ok,p_bad,y", *(f"{a!r},{b!r},{label}" for a, b, label in rows)]
    (tmp_path / "cal.csv").write_text("\n".join(lines) + "\n", encoding="utf-8")
    settings_ = {"method": "temperature", "data": "cal.csv", "label": "y"} | calibrate
    path = tmp_path / "policy.yaml"
    path.write_text(POLICY.format(calibrate=json.dumps(settings_)), encoding="utf-8")
    return path


def mixed_rows(count: int = 20) -> list[tuple[float, float, str]]:
    """Rows where the upstream model is right more often than not, but not always."""
    rows = []
    for i in range(count):
        p_bad = 0.2 + 0.6 * (i % 2)
        label = "bad" if (i % 2) == (1 if i % 5 else 0) else "ok"
        rows.append((1.0 - p_bad, p_bad, label))
    return rows


def compile_error_codes(path: Path) -> list[str]:
    with pytest.raises(PolicyError) as caught:
        compile_policy(path)
    return [d.code for d in caught.value.diagnostics]


def test_a_label_that_is_no_class_is_refused_with_its_row(tmp_path: Path) -> None:
    path = write_case(tmp_path, [*mixed_rows(), (0.5, 0.5, "fraud")])
    with pytest.raises(CompileError, match=r"row 21: label 'fraud' is not a class") as caught:
        compile_policy(path)
    assert [d.code for d in caught.value.diagnostics] == ["calibration-data-unusable"]
    assert caught.value.diagnostics[0].line == 13


@pytest.mark.parametrize(
    "bad_row", [(float("nan"), 0.5, "ok"), (0.7, 0.7, "ok"), (1.5, -0.5, "ok"), (float("inf"), 0.0, "bad")]
)
def test_a_row_that_is_not_probabilities_is_refused_with_its_number(
    tmp_path: Path, bad_row: tuple[float, float, str]
) -> None:
    path = write_case(tmp_path, [*mixed_rows(), bad_row])
    with pytest.raises(CompileError, match=r"row 21 is not a probability row"):
        compile_policy(path)


def test_a_missing_probability_column_is_refused(tmp_path: Path) -> None:
    path = write_case(tmp_path, mixed_rows())
    (tmp_path / "cal.csv").write_text("p_ok,y\n0.5,ok\n0.5,ok\n0.5,bad\n0.5,bad\n", encoding="utf-8")
    assert compile_error_codes(path) == ["calibration-column-missing"]  # check reads the header, before any fit


def test_probabilities_that_rank_every_label_first_have_no_finite_temperature(tmp_path: Path) -> None:
    rows = [(0.9, 0.1, "ok"), (0.8, 0.2, "ok"), (0.3, 0.7, "bad"), (0.1, 0.9, "bad")]
    assert compile_error_codes(write_case(tmp_path, rows)) == ["calibration-not-fitted"]


def test_probabilities_no_better_than_chance_have_no_positive_temperature() -> None:
    p = np.array([[0.9, 0.1], [0.8, 0.2], [0.3, 0.7], [0.1, 0.9]])
    with pytest.raises(FitProblem, match="no better than a uniform guess"):
        fit_temperature(p, np.array([1, 1, 0, 0]))


def test_calibration_data_changed_after_the_check_is_refused(tmp_path: Path, monkeypatch: pytest.MonkeyPatch) -> None:
    from policyc.evidence import calibration

    path = write_case(tmp_path, mixed_rows())
    real = calibration.file_sha256
    monkeypatch.setattr(calibration, "file_sha256", lambda p: "0" * 64)
    pinned = {"sha256": real(tmp_path / "cal.csv")}
    write_case(tmp_path, mixed_rows(), **pinned)
    assert compile_error_codes(path) == ["calibration-data-hash-mismatch"]


def test_a_rule_with_a_fitted_map_records_the_fit_in_its_manifest(tmp_path: Path) -> None:
    rows = mixed_rows()
    bad = sum(label == "bad" for _, _, label in rows)
    rule = compile_policy(write_case(tmp_path, rows)).rule
    described = rule.manifest["evidence"]["calibrate"]
    assert described["method"] == "temperature" and described["rows"] == 20
    assert described["class_counts"] == {"ok": 20 - bad, "bad": bad}
    # the calibration data's class mix replaces the trained priors
    assert rule.manifest["evidence"]["trained_priors"] == pytest.approx({"ok": (20 - bad) / 20, "bad": bad / 20})
    assert set(described["scores"]["before"]) == {"log_loss", "brier", "ece"}


def test_a_row_every_isotonic_map_sends_to_zero_is_invalid() -> None:
    # three classes; each map is 0 below p = 0.5, so (0.4, 0.3, 0.3) has no calibrated probability
    params = {
        "log_priors": np.log(np.full(3, 1 / 3)),
        "loss": 1.0 - np.eye(3),
        "log_trained_priors": np.log(np.full(3, 1 / 3)),
        "sum_tolerance": np.array(1e-6),
        "renormalise": np.array(0.0),
        "calibration_floor": np.array(1e-12),
        "calibration_thresholds": np.tile([0.5, 0.9], 3),
        "calibration_values": np.tile([0.0, 1.0], 3),
        "calibration_ends": np.array([2.0, 4.0, 6.0]),
    }
    posteriors, _, valid, _ = kernel.posteriors_and_risks(
        np.array([[0.4, 0.3, 0.3], [0.7, 0.2, 0.1]]), "posterior", kernel.plan("posterior", params)
    )
    assert valid.tolist() == [False, True]
    assert np.isnan(posteriors[0]).all() and posteriors[1].tolist() == [1.0, 0.0, 0.0]


@settings(max_examples=60, deadline=None)
@given(
    st.lists(
        st.tuples(st.sampled_from([0.0, 1e-16, 0.1, 0.25, 0.5, 0.75, 1.0]), st.booleans()), min_size=1, max_size=40
    )
)
def test_pool_adjacent_violators_equals_scikit_learn_for_any_data(pairs: list[tuple[float, bool]]) -> None:
    # CAL-3: the isotonic fit scikit-learn's IsotonicRegression computes, ties (within 1e-15) included
    x = np.array([p for p, _ in pairs])
    y = np.array([float(b) for _, b in pairs])
    thresholds, values = isotonic_regression(x, y)
    oracle = IsotonicRegression(out_of_bounds="clip").fit(x, y)
    grid = np.linspace(-0.1, 1.1, 49)
    np.testing.assert_allclose(np.interp(grid, thresholds, values), oracle.predict(grid), atol=1e-12)
    assert np.all(np.diff(values) >= 0.0)


@pytest.mark.parametrize(
    "tamper",
    [
        lambda p: p.pop("calibration_inverse_temperature"),
        lambda p: p.update(calibration_weights=np.eye(2)),
        lambda p: p.update(calibration_inverse_temperature=np.ones(2)),
    ],
)
def test_a_rule_whose_calibration_arrays_do_not_fit_together_is_refused(tmp_path: Path, tamper: object) -> None:
    rule = compile_policy(write_case(tmp_path, mixed_rows())).rule
    params = dict(rule.params)
    tamper(params)  # type: ignore[operator]
    with pytest.raises(ArtefactError, match="calibration"):
        Rule(rule.manifest, params)
