"""`policyc diff`: semantic changes with locations, the posterior-space diff, the data diff, gates, formats.

Outside checks name their source beside the assertion: Elkan's two-class threshold (references.md EL-2),
Chow's reject rule (references.md CH-1) with the area of a corner of the simplex, the Dirichlet(1, ..., 1)
marginals (scipy.stats.beta) and scipy.stats.bootstrap for the paired interval. Markdown and JSON
reports are compared with snapshots in tests/snapshots/; rewrite them with POLICYC_UPDATE_SNAPSHOTS=1.
"""

from __future__ import annotations

import csv
import json
import os
import re
import shutil
from pathlib import Path

import numpy as np
import pytest
import scipy.stats
from click.testing import CliRunner
from helpers import binary_policy, load_text, position, three_class_policy
from jsonschema import Draft202012Validator

from policyc.cli import main
from policyc.compiler import write_artefact
from policyc.compiler.build import compile_policy
from policyc.geometry.sampling import simplex_points
from policyc.review.diff import GateLimits, data_diff, diff, posterior_space_diff, semantic_changes
from policyc.review.diff.render import render_diff
from policyc.review.shared.bootstrap import categorical_mean_interval
from policyc.review.shared.loading import load_rule_or_policy

ROOT = Path(__file__).resolve().parents[2]
PACKHOUSE = ROOT / "policies-demo" / "packhouse"
CLAIMS = ROOT / "policies-demo" / "claims"
SNAPSHOTS = Path(__file__).resolve().parents[1] / "snapshots"


# --- builders ----------------------------------------------------------------------------------


@pytest.fixture(scope="module")
def packhouse_rules(tmp_path_factory: pytest.TempPathFactory) -> tuple[Path, Path]:
    """The demo packhouse policy, revisions 3 and 4, compiled once to rule files."""
    folder = tmp_path_factory.mktemp("rules")
    paths = []
    for name in ("policy.yaml", "policy-r4.yaml"):
        target = folder / name.replace(".yaml", ".rule")
        write_artefact(compile_policy(PACKHOUSE / name).rule, target)
        paths.append(target)
    return paths[0], paths[1]


def holdout_actions(rule_path: Path) -> np.ndarray:
    rule = load_rule_or_policy(rule_path).rule
    with (PACKHOUSE / "holdout.csv").open(newline="", encoding="utf-8") as handle:
        rows = list(csv.DictReader(handle))
    X = np.array([[float(row[f]) for f in rule.features] for row in rows])
    return rule.decide_names(X)


def run(*args: str) -> tuple[int, str, str]:
    result = CliRunner().invoke(main, [str(a) for a in args])
    return result.exit_code, result.stdout, result.stderr


# --- snapshots ---------------------------------------------------------------------------------

_HASH = re.compile(r"\b[0-9a-f]{64}\b|(?<=`)[0-9a-f]{12}(?=`)")


def normalise(text: str) -> str:
    """Hashes change with the manifest format and the policyc version; the report's shape must not."""
    return _HASH.sub("<sha256>", text)


def assert_snapshot(name: str, text: str) -> None:
    path = SNAPSHOTS / name
    text = normalise(text)
    if os.environ.get("POLICYC_UPDATE_SNAPSHOTS") == "1":
        path.parent.mkdir(exist_ok=True)
        path.write_text(text, encoding="utf-8")
        return
    assert path.is_file(), f"snapshot {name} is missing; run the tests with POLICYC_UPDATE_SNAPSHOTS=1"
    assert text == path.read_text(encoding="utf-8"), f"{name} differs; if intended, POLICYC_UPDATE_SNAPSHOTS=1"


# --- a policy against itself -------------------------------------------------------------------


def test_a_policy_against_itself_changes_nothing() -> None:
    policy = PACKHOUSE / "policy.yaml"
    code, out, _ = run(
        "diff",
        policy,
        policy,
        "--data",
        PACKHOUSE / "holdout.csv",
        "--label",
        "grade",
        "--format",
        "json",
        "--max-flip-rate",
        "0",
        "--max-simplex-change",
        "0",
        "--max-risk-increase",
        "0",
    )
    assert code == 0
    report = json.loads(out)
    assert report["semantic"] == []
    assert report["posterior_space"]["changed_share"] == 0.0
    assert report["posterior_space"]["movements"] == []
    counts = np.array(report["data"]["flips"]["counts"])
    assert counts.sum() == 800 and np.count_nonzero(counts - np.diag(np.diag(counts))) == 0
    assert report["data"]["flip_rate"] == 0.0
    assert report["data"]["empirical_risk"]["difference"]["estimate"] == 0.0
    assert report["passed"] is True and all(g["passed"] for g in report["gates"])


# --- two classes: exact thresholds -------------------------------------------------------------


@pytest.mark.parametrize(
    ("costs", "p_star"),
    [
        # golden values, Elkan 2001 §1.3 p* = (c10 - c00) / (c10 - c00 + c01 - c11) (references.md EL-2)
        ((0, 4, 1, 0), 0.2),
        ((0, 1, 4, 0), 0.8),
        ((1, 5, 3, 0), 2 / 7),
    ],
)
def test_a_two_class_loss_change_moves_the_threshold_to_elkans_p_star(
    tmp_path: Path, costs: tuple[float, float, float, float], p_star: float
) -> None:
    old = load_text(tmp_path, "old.yaml", binary_policy(0, 1, 1, 0))
    new = load_text(tmp_path, "new.yaml", binary_policy(*costs, revision=2))
    space = posterior_space_diff(old.rule, new.rule)
    assert space.method == "exact" and space.posterior_of == "pos"
    # Elkan 2001 §1.3: (0, 1, 1, 0) gives p* = 0.5 (references.md EL-2)
    assert [(i.low, i.high, i.action) for i in space.old_intervals] == [(0.0, 0.5, "say_neg"), (0.5, 1.0, "say_pos")]
    (below, above) = space.new_intervals
    assert below.action == "say_neg" and above.action == "say_pos"
    assert abs(below.high - p_star) <= 1e-12  # Elkan 2001 §1.3 p* (references.md EL-2)
    (moved,) = space.movements
    assert abs(moved.low - min(0.5, p_star)) <= 1e-12 and abs(moved.high - max(0.5, p_star)) <= 1e-12
    assert (moved.old_action, moved.new_action) == (("say_pos", "say_neg") if p_star > 0.5 else ("say_neg", "say_pos"))
    assert abs(space.changed_share - abs(p_star - 0.5)) <= 1e-12  # length of the moved interval


def test_raising_c10_from_1_to_4_gives_p_star_0_8_and_located_changes(tmp_path: Path) -> None:
    old_text, new_text = binary_policy(0, 1, 1, 0), binary_policy(0, 1, 4, 0, revision=2)
    old = load_text(tmp_path, "old.yaml", old_text)
    new = load_text(tmp_path, "new.yaml", new_text)
    report = diff(old, new)
    # Elkan 2001 §1.3 p* = c10 / (c10 + c01) = 4 / 5 with c00 = c11 = 0 (references.md EL-2)
    assert abs(report.posterior_space.new_intervals[0].high - 4 / (4 + 1)) <= 1e-12
    (change,) = report.semantic
    assert (change.what, change.change, change.old, change.new) == ("loss[say_pos][neg]", "changed", "1", "4")
    line_number = next(i for i, line in enumerate(new_text.splitlines(), 1) if line.strip().startswith("say_pos"))
    column = new_text.splitlines()[line_number - 1].index("neg: 4") + len("neg: ") + 1
    assert change.old_location == f"{tmp_path / 'old.yaml'}:{line_number}:{column}"
    assert change.new_location == f"{tmp_path / 'new.yaml'}:{line_number}:{column}"


def test_settings_added_and_removed_are_named(tmp_path: Path) -> None:
    old = load_text(tmp_path, "old.yaml", three_class_policy(None))
    new_text = three_class_policy(0.3, revision=2).replace("priors: {a: 0.3, b: 0.3", "priors: {a: 0.2, b: 0.4")
    new = load_text(tmp_path, "new.yaml", new_text)
    changes = {c.what: c for c in semantic_changes(old, new)}
    assert changes["reject.action"].change == "added" and changes["reject.action"].new == "defer"
    assert changes["reject.cost"].new == "0.3" and changes["reject.cost"].old_location is None
    lines = new_text.splitlines()
    line = next(i for i, text in enumerate(lines, 1) if text.startswith("reject:"))
    assert changes["reject.cost"].new_location == f"{tmp_path / 'new.yaml'}:{line}:{lines[line - 1].index('0.3') + 1}"
    assert (changes["priors[a]"].old, changes["priors[a]"].new) == ("0.3", "0.2")
    assert "invalid_input" not in changes


def test_rules_compare_manifests_without_locations(packhouse_rules: tuple[Path, Path]) -> None:
    old, new = (load_rule_or_policy(p) for p in packhouse_rules)
    changes = {c.what: c for c in semantic_changes(old, new)}
    assert set(changes) == {"loss[pack_premium][defect]", "reject.cost"}
    assert (changes["loss[pack_premium][defect]"].old, changes["loss[pack_premium][defect]"].new) == ("30", "45")
    assert all(c.old_location is None and c.new_location is None for c in changes.values())


def test_different_classes_are_not_comparable_on_the_simplex(tmp_path: Path) -> None:
    old = load_text(tmp_path, "old.yaml", binary_policy(0, 1, 1, 0))
    new = load_text(tmp_path, "new.yaml", three_class_policy(None))
    report = diff(old, new, limits=GateLimits(max_simplex_change=0.5))
    assert not report.posterior_space.comparable and "class lists differ" in report.posterior_space.reason
    assert {(c.what, c.change) for c in report.semantic} >= {("classes", "added"), ("classes", "removed")}
    (gate,) = report.gates
    assert not gate.passed and "cannot be measured" in gate.message


# --- three classes: Sobol estimate -------------------------------------------------------------


@pytest.mark.parametrize("n_classes", [3, 5])
def test_sobol_points_are_uniform_on_the_simplex(n_classes: int) -> None:
    points = simplex_points(n_classes, 4096, seed=7)
    assert np.allclose(points.sum(axis=1), 1.0) and (points >= 0).all()
    # Dirichlet(1, ..., 1) has Beta(1, K - 1) marginals (scipy.stats.beta; Devroye 1986, ch. V)
    result = scipy.stats.kstest(points[:, 0], scipy.stats.beta(1, n_classes - 1).cdf)
    assert result.statistic < 0.02


def test_the_library_diff_and_the_command_draw_the_same_simplex_points_by_default(tmp_path: Path) -> None:
    # `policyc diff` documents --simplex-samples 16384 (its --help); the library's diff() without samples must give
    # the same report, sample count, shares and standard errors alike, or a script and the command would disagree.
    old = load_text(tmp_path, "old.yaml", three_class_policy(None))
    new = load_text(tmp_path, "new.yaml", three_class_policy(0.3, revision=2))
    code, out, _ = run("diff", tmp_path / "old.yaml", tmp_path / "new.yaml", "--format", "json")
    assert code == 0
    library = json.loads(render_diff(diff(old, new), "json"))
    assert library["posterior_space"] == json.loads(out)["posterior_space"]


def test_adding_chow_reject_changes_the_simplex_share_one_minus_three_t_squared(tmp_path: Path) -> None:
    t = 0.3
    old = load_text(tmp_path, "old.yaml", three_class_policy(None))
    new = load_text(tmp_path, "new.yaml", three_class_policy(t, revision=2))
    space = posterior_space_diff(old.rule, new.rule, samples=1 << 14, seed=3)
    # Chow 1970 (references.md CH-1): reject iff max_k p_k < 1 - t. {p_k >= s} is a corner triangle with
    # (1 - s)^2 of the simplex's area, disjoint for s > 1/2, so the rejected share is 1 - 3 t^2.
    expected = 1.0 - 3.0 * t**2
    assert space.method == "sobol" and space.standard_error < 0.005
    assert abs(space.changed_share - expected) <= 4.0 * space.standard_error + 1e-4
    assert {(m.old_action, m.new_action) for m in space.movements} == {
        ("say_a", "defer"),
        ("say_b", "defer"),
        ("say_c", "defer"),
    }
    for movement in space.movements:  # by symmetry each class loses a third (references.md CH-1)
        assert abs(movement.share - expected / 3.0) <= 4.0 * movement.standard_error + 1e-4


# --- data --------------------------------------------------------------------------------------


def test_flip_matrix_and_risks_match_a_direct_computation(packhouse_rules: tuple[Path, Path]) -> None:
    old, new = (load_rule_or_policy(p).rule for p in packhouse_rules)
    result = data_diff(old, new, PACKHOUSE / "holdout.csv", "grade", batch_rows=97)
    with (PACKHOUSE / "holdout.csv").open(newline="", encoding="utf-8") as handle:
        rows = list(csv.DictReader(handle))
    X = np.array([[float(row[f]) for f in old.features] for row in rows])
    y = np.array([new.classes.index(row["grade"]) for row in rows])
    a_old, a_new = old.decide(X), new.decide(X)
    risks = new.risks(X)
    assert result.flips.sum() == len(rows) and result.flipped == int((a_old != a_new).sum())
    for i, j in [(0, 0), (1, 3), (2, 3), (3, 3)]:
        assert result.flips[i, j] == int(((a_old == i) & (a_new == j)).sum())
    assert result.expected_risk is not None and result.empirical_risk is not None
    assert np.isclose(result.expected_risk[0], risks[np.arange(len(y)), a_old].mean(), rtol=1e-12)
    assert np.isclose(result.expected_risk[1], risks[np.arange(len(y)), a_new].mean(), rtol=1e-12)
    assert result.expected_risk[1] <= result.expected_risk[0]  # the new decisions minimise R_new by construction
    loss = np.asarray(new.params["loss"])
    assert np.isclose(result.empirical_risk[0], loss[a_old, y].mean(), rtol=1e-12)
    assert np.isclose(result.empirical_risk[1], loss[a_new, y].mean(), rtol=1e-12)
    assert result.reject_rate_new == pytest.approx((a_new == 3).mean(), abs=0)
    # every row is valid here, so each rule's deferrals are all by risk
    assert result.deferred_old == {"min-risk": int((a_old == 3).sum()), "novelty": 0, "invalid": 0}
    assert result.deferred_new == {"min-risk": int((a_new == 3).sum()), "novelty": 0, "invalid": 0}


def test_the_paired_interval_agrees_with_scipy_bootstrap() -> None:
    rng = np.random.default_rng(11)
    old_loss = rng.choice([0.0, 1.0, 2.5, 10.0], size=600, p=[0.6, 0.2, 0.15, 0.05])
    new_loss = np.where(rng.random(600) < 0.3, rng.choice([0.0, 1.0, 2.5, 10.0], size=600), old_loss)
    values, counts = np.unique(np.stack([old_loss, new_loss]), axis=1, return_counts=True)
    ours = categorical_mean_interval(counts, values[1] - values[0], 0.95, 20000, seed=5)
    # scipy.stats.bootstrap, paired percentile interval of the mean difference new - old
    theirs = scipy.stats.bootstrap(
        (old_loss, new_loss),
        lambda o, n, axis=-1: np.mean(n - o, axis=axis),
        paired=True,
        vectorized=True,
        n_resamples=20000,
        confidence_level=0.95,
        method="percentile",
        rng=np.random.default_rng(6),
    ).confidence_interval
    width = theirs.high - theirs.low
    assert ours.estimate == pytest.approx(np.mean(new_loss - old_loss), abs=1e-12)
    assert abs(ours.low - theirs.low) < 0.05 * width and abs(ours.high - theirs.high) < 0.05 * width


# --- CLI: gates, usage, errors -----------------------------------------------------------------


def test_a_failed_flip_gate_exits_1_naming_value_limit_and_excess(packhouse_rules: tuple[Path, Path]) -> None:
    old, new = packhouse_rules
    rate = float((holdout_actions(old) != holdout_actions(new)).mean())
    code, _, err = run("diff", old, new, "--data", PACKHOUSE / "holdout.csv", "--max-flip-rate", "0.01")
    assert code == 1
    assert (
        f"gate max-flip-rate failed: flip rate on the data {rate:.4g} exceeds the limit 0.01 by {rate - 0.01:.4g}"
        in err
    )
    code, _, err = run("diff", old, new, "--data", PACKHOUSE / "holdout.csv", "--max-flip-rate", f"{rate}")
    assert code == 0 and err == ""


def test_reject_risk_and_simplex_gates(packhouse_rules: tuple[Path, Path]) -> None:
    old, new = packhouse_rules
    reject_rate = float((holdout_actions(new) == "hold_for_inspector").mean())
    data = ("--data", PACKHOUSE / "holdout.csv")
    code, _, err = run("diff", old, new, *data, "--max-reject-rate", "0.05")
    assert code == 1 and f"gate max-reject-rate failed: the new rule's reject rate on the data {reject_rate:.4g}" in err
    code, _, err = run("diff", old, new, "--max-simplex-change", "0.1")
    assert (
        code == 1 and "gate max-simplex-change failed: share of the simplex" in err and "exceeds the limit 0.1" in err
    )
    code, out, _ = run("diff", old, new, *data, "--label", "grade", "--max-risk-increase", "0", "--format", "json")
    gate = json.loads(out)["gates"][0]
    assert gate["basis"].startswith("empirical risk increase") and gate["passed"] == (code == 0)
    # without labels the gate could never fail (the new rule minimises risk under its own model): usage error
    code, _, err = run("diff", old, new, *data, "--max-risk-increase", "-1", "--format", "json")
    assert code == 2 and "--max-risk-increase needs --label" in err


@pytest.mark.parametrize(
    "extra",
    [
        ["--max-flip-rate", "0.1"],
        ["--max-reject-rate", "0.1"],
        ["--label", "grade"],
        ["--simplex-samples", "1000"],
        ["--format", "yaml"],
    ],
)
def test_usage_errors_exit_2(extra: list[str]) -> None:
    policy = PACKHOUSE / "policy.yaml"
    code, _, _ = run("diff", policy, policy, *extra)
    assert code == 2


def test_a_policy_with_errors_is_trouble_exit_2_with_its_diagnostics(tmp_path: Path) -> None:
    broken = tmp_path / "broken.yaml"
    broken.write_text(binary_policy(0, 1, 1, 0).replace("pos: 0.5}", "pos: 0.7}", 1), encoding="utf-8")
    code, _, err = run("diff", broken, PACKHOUSE / "policy.yaml")
    assert code == 2 and "priors-do-not-sum-to-one" in err and f"{broken}:4:" in err  # line 4 holds the priors


@pytest.mark.parametrize("trouble", ["missing-rule", "missing-data", "bad-label-column"])
def test_an_input_diff_cannot_use_exits_2_never_1(tmp_path: Path, trouble: str) -> None:
    # 1 means "a gate failed"; CI must be able to tell a broken job from a change that is too big
    policy = PACKHOUSE / "policy.yaml"
    reference = PACKHOUSE / "incoming.csv"
    args = {
        "missing-rule": [tmp_path / "absent.rule", policy],
        "missing-data": [policy, policy, "--data", tmp_path / "absent.csv"],
        "bad-label-column": [policy, policy, "--data", reference, "--label", "no_such_column"],
    }[trouble]
    code, out, err = run("diff", *args, "--max-flip-rate", "0") if trouble != "missing-rule" else run("diff", *args)
    assert code == 2 and out == "" and "Traceback" not in err and err.startswith("error: ")


def test_trouble_in_json_format_is_a_json_error_object(tmp_path: Path) -> None:
    policy = PACKHOUSE / "policy.yaml"
    code, out, err = run("diff", policy, policy, "--data", tmp_path / "absent.csv", "--format", "json")
    error = json.loads(err)
    assert code == 2 and out == ""
    assert error["error"] == "DataError" and error["stage"] == "evidence" and "absent.csv" in error["message"]


# --- snapshots of the rendered reports ---------------------------------------------------------


@pytest.fixture
def claims_pair(tmp_path: Path, monkeypatch: pytest.MonkeyPatch) -> Path:
    """Claims revision 1 and a revision 2 (cheaper investigation and referral), in a folder of their own."""
    text = (CLAIMS / "policy.yaml").read_text(encoding="utf-8")
    (tmp_path / "claims-r1.yaml").write_text(text, encoding="utf-8")
    revised = text.replace("revision: 1", "revision: 2").replace("legitimate: 120", "legitimate: 100")
    revised = revised.replace("cost: 90}", "cost: 75}")
    assert revised.count("legitimate: 100") == 1 and "cost: 75" in revised
    (tmp_path / "claims-r2.yaml").write_text(revised, encoding="utf-8")
    shutil.copy(CLAIMS / "holdout.csv", tmp_path / "holdout.csv")
    monkeypatch.chdir(tmp_path)
    return tmp_path


CLAIMS_ARGS = [
    "diff",
    "claims-r1.yaml",
    "claims-r2.yaml",
    "--data",
    "holdout.csv",
    "--label",
    "outcome",
    "--max-flip-rate",
    "0.05",
    "--max-risk-increase",
    "0",
    "--max-reject-rate",
    "0.1",
    "--max-simplex-change",
    "0.1",
]


@pytest.mark.parametrize(("output_format", "snapshot"), [("markdown", "diff-claims.md"), ("json", "diff-claims.json")])
def test_claims_report_snapshot(claims_pair: Path, output_format: str, snapshot: str) -> None:
    code, out, err = run(*CLAIMS_ARGS, "--format", output_format)
    assert code == 1 and "gate max-reject-rate failed" in err
    assert_snapshot(snapshot, out)
    if output_format == "json":
        assert list(json.loads(out)) == ["data", "gates", "new", "old", "passed", "posterior_space", "semantic"]
        schema = json.loads((SNAPSHOTS.parent.parent / "schemas" / "diff-report.schema.json").read_text("utf-8"))
        Draft202012Validator(schema).validate(json.loads(out))


def test_packhouse_markdown_snapshot(monkeypatch: pytest.MonkeyPatch) -> None:
    monkeypatch.chdir(ROOT)
    folder = "policies-demo/packhouse"
    code, out, _ = run(
        "diff",
        f"{folder}/policy.yaml",
        f"{folder}/policy-r4.yaml",
        "--data",
        f"{folder}/holdout.csv",
        "--label",
        "grade",
        "--format",
        "markdown",
    )
    assert code == 0
    assert_snapshot("diff-packhouse.md", out)


def test_report_goes_to_a_file_with_dash_o(claims_pair: Path) -> None:
    code, out, err = run("diff", "claims-r1.yaml", "claims-r2.yaml", "--format", "markdown", "-o", "report.md")
    assert code == 0 and out == "" and "report -> report.md" in err
    assert (claims_pair / "report.md").read_text(encoding="utf-8").startswith("## policyc diff: claims-routing r1")


def test_a_diff_between_revisions_with_limits_says_when_a_price_moves(tmp_path: Path) -> None:
    r6 = ROOT / "policies-demo" / "packhouse" / "policy-r6.yaml"
    for name in ("train.csv", "reference.csv"):
        shutil.copy(r6.parent / name, tmp_path / name)
    tighter = tmp_path / "policy-r7.yaml"
    tighter.write_text(
        r6.read_text(encoding="utf-8")
        .replace("revision: 6", "revision: 7")
        .replace("hold_for_inspector: 0.05", "hold_for_inspector: 0.03"),
        encoding="utf-8",
    )
    old, new = load_rule_or_policy(r6), load_rule_or_policy(tighter)
    changes = {c.what: c for c in semantic_changes(old, new)}
    price = changes["limit max_share[hold_for_inspector] price"]
    assert price.change == "changed" and float(price.new) > float(price.old) >= 0.0  # a tighter cap costs more
    share = changes["limit max_share[hold_for_inspector]"]
    assert share.new == "0.03" and share.new_location == position(
        tighter, tighter.read_text("utf-8"), "hold_for_", "0.03"
    )
    assert price.new_location is not None and price.new_location.startswith(str(tighter))
    # the loss entries compared are the stated ones: the limits' adjustments are not reported as loss edits
    assert not any(what.startswith("loss[") for what in changes)
    against_r4 = {c.what: c for c in semantic_changes(load_rule_or_policy(r6.parent / "policy-r4.yaml"), old)}
    recall = against_r4["limit min_recall[defect]"]
    assert recall.new_location == position(r6, r6.read_text("utf-8"), "defect: {actions", "0.99")
    assert not any(what.startswith("loss[") for what in against_r4)
    assert "limit min_recall[defect] price" in against_r4
    # a minimum recall names the actions that count as catching the class; a maximum share has none
    assert (
        "limit min_recall[defect] actions" in against_r4
        and "limit max_share[hold_for_inspector] actions" not in against_r4
    )


def test_data_diff_charges_a_limited_rule_by_its_stated_matrix() -> None:
    """r4 is r6 without limits (same losses and fit): on r6's reference rows the expected-risk difference
    new - old is exactly the price of r6's limits, computed by the compiler on the same rows."""
    folder = ROOT / "policies-demo" / "packhouse"
    old, new = load_rule_or_policy(folder / "policy-r4.yaml"), load_rule_or_policy(folder / "policy-r6.yaml")
    report = data_diff(old.rule, new.rule, folder / "reference.csv")
    assert report.expected_risk is not None
    before, after, rows = report.expected_risk
    assert rows == 8000
    assert after - before == pytest.approx(new.rule.manifest["limits"]["price"], rel=1e-9)
