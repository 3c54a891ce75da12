"""The compile, decide and inspect commands, through click's CliRunner."""

from __future__ import annotations

import csv
import json
import re
from pathlib import Path

import numpy as np
import pyarrow.csv as pacsv
import pyarrow.parquet as pq
import pytest
from click.testing import CliRunner, Result
from helpers import CLAIMS, DEMOS, PACKHOUSE, read_csv_columns, two_class_text

from policyc.cli import main
from policyc.render import rounded
from policyc.runtime import Rule, load_rule

INCOMING = DEMOS / "packhouse" / "incoming.csv"


def run(*args: str | Path) -> Result:
    return CliRunner().invoke(main, [str(a) for a in args], catch_exceptions=False)


@pytest.fixture(scope="module")
def packhouse_file(tmp_path_factory: pytest.TempPathFactory) -> Path:
    path = tmp_path_factory.mktemp("cli") / "packhouse.rule"
    result = run("compile", PACKHOUSE, "-o", path)
    assert result.exit_code == 0, result.output
    return path


@pytest.fixture(scope="module")
def claims_file(tmp_path_factory: pytest.TempPathFactory) -> Path:
    path = tmp_path_factory.mktemp("cli") / "claims.rule"
    result = run("compile", CLAIMS, "-o", path)
    assert result.exit_code == 0, result.output
    return path


def read_rows(path: Path) -> list[dict[str, str]]:
    with path.open(newline="", encoding="utf-8") as handle:
        return list(csv.DictReader(handle))


# --- compile ------------------------------------------------------------------------------------------------


def test_compile_writes_rule_and_module_and_prints_the_hash(tmp_path: Path) -> None:
    rule_file, module_file = tmp_path / "out" / "p.rule", tmp_path / "out" / "p_rule.py"
    missing = run("compile", PACKHOUSE, "-o", rule_file)
    assert missing.exit_code == 1 and "does not exist; create it first" in missing.output  # no silent mkdir -p
    assert not rule_file.parent.exists()
    rule_file.parent.mkdir()
    result = run("compile", PACKHOUSE, "-o", rule_file, "--emit-python", module_file)
    assert result.exit_code == 0, result.output
    rule = load_rule(rule_file)
    match = re.search(r"sha256 ([0-9a-f]{64})", result.output)
    assert match is not None and match.group(1) == rule.content_sha256
    assert "packhouse-grading r3" in result.output
    source = module_file.read_text(encoding="utf-8")
    assert "def decide(" in source and rule.content_sha256 in source


def test_compile_reports_policy_errors_with_locations(tmp_path: Path) -> None:
    policy = tmp_path / "policy.yaml"
    policy.write_text(
        two_class_text(
            priors=[0.6, 0.6],
        ),
        encoding="utf-8",
    )
    result = run("compile", policy, "-o", tmp_path / "p.rule")
    assert result.exit_code == 1
    assert re.search(r"policy\.yaml:4:\d+: error\[priors-do-not-sum-to-one\]", result.output), result.output
    assert not (tmp_path / "p.rule").exists()


def test_compile_reports_yaml_errors_with_locations(tmp_path: Path) -> None:
    policy = tmp_path / "policy.yaml"
    policy.write_text("policy: p\nclasses: [a, b]\nclasses: [c, d]\n", encoding="utf-8")
    result = run("compile", policy, "-o", tmp_path / "p.rule")
    assert result.exit_code == 1
    assert re.search(r"policy\.yaml:3:\d+: error\[", result.output), result.output


def test_compile_without_output_is_a_usage_error(tmp_path: Path) -> None:
    result = run("compile", PACKHOUSE)
    assert result.exit_code == 2
    assert "-o" in result.output


# --- decide ---------------------------------------------------------------------------------------------------


def test_decide_csv_keeps_input_columns_and_adds_action(packhouse_file: Path, tmp_path: Path) -> None:
    out = tmp_path / "decided.csv"
    result = run("decide", packhouse_file, INCOMING, "-o", out)
    assert result.exit_code == 0, result.output
    rule = load_rule(packhouse_file)
    rows = read_rows(out)
    source = read_rows(INCOMING)
    assert list(rows[0]) == [*source[0], "action"]
    assert [r["item_id"] for r in rows] == [r["item_id"] for r in source]
    X = read_csv_columns(INCOMING, rule.features)
    assert [r["action"] for r in rows] == rule.decide_names(X).tolist()
    assert f"{len(rows)} rows" in result.output


def test_decide_parquet_to_parquet(packhouse_file: Path, tmp_path: Path) -> None:
    data = tmp_path / "incoming.parquet"
    pq.write_table(pacsv.read_csv(INCOMING), data)
    out = tmp_path / "decided.parquet"
    result = run("decide", packhouse_file, data, "-o", out)
    assert result.exit_code == 0, result.output
    table = pq.read_table(out)
    rule = load_rule(packhouse_file)
    assert table.column_names == ["item_id", *rule.features, "action"]
    X = np.column_stack([table.column(f).to_numpy() for f in rule.features])
    assert table.column("action").to_pylist() == rule.decide_names(X).tolist()


def test_decide_explain_adds_posteriors_risks_runner_up_and_margin(packhouse_file: Path, tmp_path: Path) -> None:
    out = tmp_path / "explained.csv"
    result = run("decide", packhouse_file, INCOMING, "-o", out, "--explain")
    assert result.exit_code == 0, result.output
    rule: Rule = load_rule(packhouse_file)
    rows = read_rows(out)
    expected_columns = [
        *(f"posterior_{c}" for c in rule.classes),
        *(f"risk_{a}" for a in rule.actions),
        "runner_up",
        "margin",
        "reason",
    ]
    assert list(rows[0])[-len(expected_columns) - 1 :] == ["action", *expected_columns]
    explanation = rule.explain(read_csv_columns(INCOMING, rule.features))
    posteriors = np.array([[float(r[f"posterior_{c}"]) for c in rule.classes] for r in rows])
    risks = np.array([[float(r[f"risk_{a}"]) for a in rule.actions] for r in rows])
    assert np.allclose(posteriors, explanation.posteriors, rtol=1e-12, atol=0)
    assert np.allclose(risks, explanation.risks, rtol=1e-12, atol=0)
    assert [r["runner_up"] for r in rows] == [rule.actions[i] for i in explanation.runner_up]
    assert np.allclose([float(r["margin"]) for r in rows], explanation.margin, rtol=1e-12, atol=1e-15)


def test_decide_refuses_a_non_numeric_value_and_writes_nothing(packhouse_file: Path, tmp_path: Path) -> None:
    lines = INCOMING.read_text(encoding="utf-8").splitlines()
    fields = lines[3].split(",")
    fields[1] = "firm"  # data row 3, column firmness_n
    lines[3] = ",".join(fields)
    data = tmp_path / "bad.csv"
    data.write_text("\n".join(lines) + "\n", encoding="utf-8")
    out = tmp_path / "decided.csv"
    result = run("decide", packhouse_file, data, "-o", out)
    assert result.exit_code == 1
    assert "row 3" in result.output and "firmness_n" in result.output and "'firm'" in result.output
    assert sorted(p.name for p in tmp_path.iterdir()) == ["bad.csv"]


def test_decide_refuses_an_existing_action_column(packhouse_file: Path, tmp_path: Path) -> None:
    lines = INCOMING.read_text(encoding="utf-8").splitlines()
    lines = [lines[0] + ",action", *(line + ",x" for line in lines[1:])]
    data = tmp_path / "has_action.csv"
    data.write_text("\n".join(lines) + "\n", encoding="utf-8")
    out = tmp_path / "decided.csv"
    result = run("decide", packhouse_file, data, "-o", out)
    assert result.exit_code == 1
    assert "'action'" in result.output and "already exist" in result.output
    assert "Traceback" not in result.output
    assert not out.exists()


def test_decide_names_invalid_rows_under_invalid_input_error(tmp_path: Path) -> None:
    policy = tmp_path / "policy.yaml"
    policy.write_text(
        two_class_text(),
        encoding="utf-8",
    )
    rule_file = tmp_path / "p.rule"
    assert run("compile", policy, "-o", rule_file).exit_code == 0
    data = tmp_path / "in.csv"
    data.write_text("ll_c0,ll_c1\n-1.0,-2.0\n-1.0,inf\n-3.0,-0.5\n", encoding="utf-8")
    out = tmp_path / "out.csv"
    result = run("decide", rule_file, data, "-o", out)
    assert result.exit_code == 1
    assert "row(s) 2 " in result.output
    assert not out.exists()
    data.write_text("ll_c0,ll_c1\n-1.0,-2.0\n-3.0,-0.5\n", encoding="utf-8")
    assert run("decide", rule_file, data, "-o", out).exit_code == 0
    assert [r["action"] for r in read_rows(out)] == ["a0", "a1"]


def test_decide_with_a_missing_data_file_fails_cleanly(packhouse_file: Path, tmp_path: Path) -> None:
    result = run("decide", packhouse_file, tmp_path / "absent.csv", "-o", tmp_path / "out.csv")
    assert result.exit_code == 1
    assert "absent.csv" in result.output and "Traceback" not in result.output


# --- inspect --------------------------------------------------------------------------------------------------


def test_inspect_text_shows_the_labelled_loss_table(packhouse_file: Path) -> None:
    result = run("inspect", packhouse_file)
    assert result.exit_code == 0, result.output
    rule = load_rule(packhouse_file)
    assert f"content_sha256: {rule.content_sha256}" in result.output
    assert "action \\ true class" in result.output
    header = next(line for line in result.output.splitlines() if line.startswith("action \\ true class"))
    assert header.split()[-3:] == ["premium", "standard", "defect"]
    row = next(line for line in result.output.splitlines() if line.startswith("pack_premium "))
    assert row.split()[1:] == ["0", "4", "30"]
    row = next(line for line in result.output.splitlines() if line.startswith("hold_for_inspector "))
    assert row.split()[1:] == ["2.5", "2.5", "2.5"]
    assert "decision by P(" not in result.output  # three classes: no posterior intervals


def test_inspect_claims_shows_posterior_intervals(claims_file: Path) -> None:
    result = run("inspect", claims_file)
    assert result.exit_code == 0, result.output
    # derived from the risk lines on q = P(fraudulent|x) (references.md EL-1, PR-7): pay 1800q,
    # investigate 120(1 - q) + 60q, refer 90: pay below q = 90/1800 = 0.05, refer up to 120 - 60q = 90 at q = 0.5
    assert "decision by P(fraudulent | x):" in result.output
    assert "[0, 0.05]: pay" in result.output
    assert "[0.05, 0.5]: refer_to_senior_adjuster" in result.output
    assert "[0.5, 1]: investigate" in result.output


def test_inspect_json(claims_file: Path) -> None:
    result = run("inspect", claims_file, "--format", "json")
    assert result.exit_code == 0, result.output
    report = json.loads(result.output)
    rule = load_rule(claims_file)
    assert report["content_sha256"] == rule.content_sha256
    assert report["classes"] == ["legitimate", "fraudulent"]
    assert report["actions"] == ["pay", "investigate", "refer_to_senior_adjuster"]
    assert report["loss"]["pay"] == {"legitimate": 0.0, "fraudulent": 1800.0}
    intervals = [(i["low"], i["high"], i["action"]) for i in report["posterior_intervals"]]
    assert intervals == [
        (0.0, pytest.approx(0.05, abs=1e-15), "pay"),
        (pytest.approx(0.05, abs=1e-15), pytest.approx(0.5, abs=1e-15), "refer_to_senior_adjuster"),
        (pytest.approx(0.5, abs=1e-15), 1.0, "investigate"),
    ]
    assert all(i["posterior_of"] == "fraudulent" for i in report["posterior_intervals"])


@pytest.mark.parametrize("command", ["inspect", "decide"])
def test_corrupt_rule_file_exits_1_with_a_clear_message(command: str, tmp_path: Path) -> None:
    junk = tmp_path / "junk.rule"
    junk.write_bytes(b"\x00not a rule at all")
    args = [command, junk] + ([INCOMING, "-o", tmp_path / "out.csv"] if command == "decide" else [])
    result = run(*args)
    assert result.exit_code == 1
    assert "junk.rule" in result.output and "not a policyc rule file" in result.output
    assert "Traceback" not in result.output


def test_tampered_rule_file_exits_1_naming_the_hash(packhouse_file: Path, tmp_path: Path) -> None:
    import io
    import zipfile

    with zipfile.ZipFile(packhouse_file) as archive:
        contents = {name: archive.read(name) for name in archive.namelist()}
    blob = bytearray(contents["arrays/log_priors.npy"])
    blob[-2] ^= 0x01
    contents["arrays/log_priors.npy"] = bytes(blob)
    buffer = io.BytesIO()
    with zipfile.ZipFile(buffer, "w") as archive:
        for name, data in contents.items():
            archive.writestr(name, data)
    tampered = tmp_path / "tampered.rule"
    tampered.write_bytes(buffer.getvalue())
    result = run("inspect", tampered)
    assert result.exit_code == 1
    assert "content hash mismatch" in result.output


def test_compile_reports_the_limits_as_in_the_demo_report(tmp_path: Path, monkeypatch: pytest.MonkeyPatch) -> None:
    """policies-demo/packhouse/policy-r6.compile.txt is what compile prints (the content hash aside)."""
    monkeypatch.chdir(tmp_path)
    result = run("compile", DEMOS / "packhouse" / "policy-r6.yaml", "-o", "packhouse-r6.rule")
    assert result.exit_code == 0, result.output
    stored = (DEMOS / "packhouse" / "policy-r6.compile.txt").read_text(encoding="utf-8")
    without_hash = re.compile(r"sha256 [0-9a-f]{64}")
    assert without_hash.sub("sha256 …", result.output) == without_hash.sub("sha256 …", stored)
    record = load_rule(tmp_path / "packhouse-r6.rule").manifest["limits"]
    cap, recall = record["limits"]
    assert cap["rate"] <= 0.05 and recall["rate"] >= 0.99
    assert cap["price"] >= 0.0 and 0.0 <= recall["price"] <= record["price"]


def test_inspect_shows_the_stated_matrix_and_the_limits(tmp_path: Path) -> None:
    rule_file = tmp_path / "r6.rule"
    assert run("compile", DEMOS / "packhouse" / "policy-r6.yaml", "-o", rule_file).exit_code == 0
    text = run("inspect", rule_file).output
    assert "(the adjusted matrix L' of the limits below)" in text and "stated loss (EUR per item)" in text
    assert "at most 5.00% get hold_for_inspector" in text and "price of all limits together" in text
    report = json.loads(run("inspect", rule_file, "--format", "json").output)
    assert report["limits"] == rounded(load_rule(rule_file).manifest["limits"])  # JSON reports round floats
    assert (
        report["loss"]["hold_for_inspector"]["premium"]
        == report["limits"]["adjusted_loss"]["hold_for_inspector"]["premium"]
    )
