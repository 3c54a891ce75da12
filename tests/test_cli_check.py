"""`policyc check` and `policyc schema` through click's CliRunner: output shapes and exit codes."""

from __future__ import annotations

import json
import re
from pathlib import Path

import pytest
from click.testing import CliRunner, Result

from policyc.cli import main

ROOT = Path(__file__).resolve().parent.parent
DEMOS = sorted((ROOT / "policies-demo").glob("*/policy*.yaml"))
SCHEMA_FILE = ROOT / "schemas" / "policy.schema.json"

GOOD = """\
policy: p
classes: [ok, bad]
priors: {ok: 0.9, bad: 0.1}
actions: [accept, refuse]
loss_unit: EUR
loss:
  accept: {ok: 0, bad: 10}
  refuse: {ok: 1, bad: 0}
reject: {action: hold, cost: 0.5}
evidence: {kind: log-likelihood, columns: {ok: l_ok, bad: l_bad}}
"""

# Priors sum to 1.2 (line 3) and invalid input has no reject option to go to (line 9).
ERRORS = """\
policy: p
classes: [ok, bad]
priors: {ok: 0.9, bad: 0.3}
actions: [accept, refuse]
loss:
  accept: {ok: 0, bad: 10}
  refuse: {ok: 1, bad: 0}
evidence: {kind: log-likelihood, columns: {ok: l_ok, bad: l_bad}}
invalid_input: reject
"""

# Only a warning: a zero prior (line 5).
WARNING_ONLY = """\
policy: p
classes: [ok, bad]
priors:
  ok: 1.0
  bad: 0.0
actions: [accept, refuse]
loss:
  accept: {ok: 0, bad: 10}
  refuse: {ok: 1, bad: 0}
evidence: {kind: log-likelihood, columns: {ok: l_ok, bad: l_bad}}
"""


def run(*args: str) -> Result:
    return CliRunner().invoke(main, list(args))


def write(tmp_path: Path, text: str, name: str = "policy.yaml") -> str:
    path = tmp_path / name
    path.write_text(text, encoding="utf-8")
    return str(path)


def flat(text: str) -> str:
    return " ".join(text.split())


def test_check_demo_policies_exit_zero() -> None:
    result = run("check", *map(str, DEMOS))
    assert result.exit_code == 0, result.output
    for demo in DEMOS:
        assert f"{demo}: ok (0 errors, 0 warnings, " in result.output


def test_check_clean_policy_exits_zero(tmp_path: Path) -> None:
    path = write(tmp_path, GOOD)
    result = run("check", path)
    assert result.exit_code == 0
    assert result.output.strip() == f"{path}: ok (0 errors, 0 warnings, 0 notes)"


def test_check_errors_exit_one_with_located_lines(tmp_path: Path) -> None:
    path = write(tmp_path, ERRORS)
    result = run("check", path)
    assert result.exit_code == 1
    assert f"{path}:3:9: error[priors-do-not-sum-to-one] " in result.output
    assert f"{path}:9:16: error[invalid-input-needs-reject] " in result.output
    assert "    hint: " in result.output
    assert f"{path}: errors (2 errors, 0 warnings, 0 notes)" in result.output


def test_check_source_errors_exit_one(tmp_path: Path) -> None:
    path = write(tmp_path, "policy: p\npolicy: q\n")
    result = run("check", path)
    assert result.exit_code == 1
    assert f"{path}:2:1: error[duplicate-key]" in result.output


def test_check_missing_file_exits_one(tmp_path: Path) -> None:
    result = run("check", str(tmp_path / "absent.yaml"))
    assert result.exit_code == 1
    assert "error[policy-unreadable]" in result.output


def test_check_one_bad_policy_among_good_ones_fails(tmp_path: Path) -> None:
    result = run("check", str(DEMOS[0]), write(tmp_path, ERRORS))
    assert result.exit_code == 1
    assert f"{DEMOS[0]}: ok" in result.output


def test_warnings_exit_zero_unless_strict(tmp_path: Path) -> None:
    path = write(tmp_path, WARNING_ONLY)
    relaxed = run("check", path)
    assert relaxed.exit_code == 0
    assert f"{path}:5:8: warning[zero-prior]" in relaxed.output
    assert f"{path}: ok (0 errors, 1 warnings, 0 notes)" in relaxed.output
    strict = run("check", "--strict", path)
    assert strict.exit_code == 1
    assert "warning[zero-prior]" in strict.output


def test_strict_passes_a_clean_policy(tmp_path: Path) -> None:
    assert run("check", "--strict", write(tmp_path, GOOD)).exit_code == 0


def test_json_format_is_a_list_of_documented_objects(tmp_path: Path) -> None:
    path = write(tmp_path, ERRORS)
    result = run("check", "--format", "json", path)
    assert result.exit_code == 1
    data = json.loads(result.output)
    assert isinstance(data, list) and len(data) == 2
    keys = {"code", "severity", "message", "path", "file", "line", "col", "hint"}
    assert all(set(item) == keys for item in data)
    assert [(d["code"], d["severity"], d["file"], d["line"], d["col"], d["path"]) for d in data] == [
        ("priors-do-not-sum-to-one", "error", path, 3, 9, "$.priors"),
        ("invalid-input-needs-reject", "error", path, 9, 16, "$.invalid_input"),
    ]


def test_json_format_of_clean_policies_is_an_empty_list() -> None:
    result = run("check", "--format", "json", *map(str, DEMOS))
    assert result.exit_code == 0
    assert json.loads(result.output) == []


def test_show_prints_the_labelled_loss_table(tmp_path: Path) -> None:
    result = run("check", "--show", write(tmp_path, GOOD))
    assert result.exit_code == 0
    lines = result.output.splitlines()
    assert "loss (EUR), loss[action][true class]:" in lines
    header = next(line for line in lines if line.startswith("action \\ true class"))
    assert header.split()[-2:] == ["ok", "bad"]
    assert re.search(r"^accept\s+0\s+10$", result.output, re.MULTILINE)
    assert re.search(r"^refuse\s+1\s+0$", result.output, re.MULTILINE)
    assert "reject: hold at cost 0.5" in lines
    assert re.search(r"^  accept: margin [0-9.e-]+ at \(ok=", result.output, re.MULTILINE)
    assert re.search(r"^  hold: margin ", result.output, re.MULTILINE)


def test_show_on_a_demo_names_every_action() -> None:
    packhouse = ROOT / "policies-demo" / "packhouse" / "policy.yaml"
    result = run("check", "--show", str(packhouse))
    assert result.exit_code == 0
    assert "action \\ true class" in result.output
    for name in ("pack_premium", "pack_standard", "juice", "hold_for_inspector"):
        assert f"  {name}: margin" in result.output


def test_show_reports_an_action_that_is_never_chosen(tmp_path: Path) -> None:
    text = GOOD.replace("actions: [accept, refuse]", "actions: [accept, refuse, shred]").replace(
        "  refuse: {ok: 1, bad: 0}\n", "  refuse: {ok: 1, bad: 0}\n  shred: {ok: 2, bad: 0}\n"
    )
    result = run("check", "--show", write(tmp_path, text))
    assert result.exit_code == 0
    assert "warning[dominated-action]" in result.output
    assert "  shred: never chosen" in result.output


def test_source_prints_the_line_and_a_caret(tmp_path: Path) -> None:
    path = write(tmp_path, ERRORS)
    result = run("check", "--source", path)
    assert result.exit_code == 1
    lines = result.output.splitlines()
    at = lines.index(next(line for line in lines if "priors-do-not-sum-to-one" in line))
    excerpt = [line for line in lines[at + 1 : at + 4] if not line.startswith("    hint:")]
    assert excerpt[:2] == ["    priors: {ok: 0.9, bad: 0.3}", "            ^"]


def test_source_excerpt_for_a_file_that_failed_strict_loading(tmp_path: Path) -> None:
    path = write(tmp_path, "policy: p\nrenormalise: yes\n")
    result = run("check", "--source", path)
    assert result.exit_code == 1
    assert "    renormalise: yes\n                 ^" in result.output


def test_no_source_by_default_off_a_terminal(tmp_path: Path) -> None:
    result = run("check", write(tmp_path, ERRORS))
    assert "^" not in result.output
    assert run("check", "--no-source", write(tmp_path, ERRORS)).output == result.output


@pytest.mark.parametrize(
    "args",
    [
        ("check",),
        ("check", "--bogus", "policy.yaml"),
        ("check", "--format", "xml", "policy.yaml"),
        ("no-such-command",),
    ],
)
def test_usage_errors_exit_two(args: tuple[str, ...]) -> None:
    result = run(*args)
    assert result.exit_code == 2
    assert "Usage:" in result.output or "Error:" in result.output


def test_schema_prints_the_checked_in_schema() -> None:
    result = run("schema")
    assert result.exit_code == 0
    assert result.output == SCHEMA_FILE.read_text(encoding="utf-8")
    assert json.loads(result.output)["$id"] == "policy.schema.json"


@pytest.mark.parametrize("args", [("--help",), ("-h",), ("check", "--help")])
def test_help_shows_the_caution(args: tuple[str, ...]) -> None:
    result = run(*args)
    assert result.exit_code == 0
    assert "only as good as its evidence model" in flat(result.output)


def test_check_help_states_the_exit_codes() -> None:
    text = flat(run("check", "--help").output)
    assert "Exit 0 when clean or warnings only, 1 on errors" in text
    assert "--strict" in text and "--format [text|json]" in text


def test_show_lists_the_limits_and_the_entries_their_multipliers_raise() -> None:
    policy = Path(__file__).resolve().parents[1] / "policies-demo" / "packhouse" / "policy-r6.yaml"
    result = run("check", "--show", str(policy))
    assert result.exit_code == 0, result.output
    assert "confidence 0.95 (each at 0.975)" in result.output
    assert "max_share[hold_for_inspector] ≤ 0.05: its μ is added to the reject cost" in result.output
    assert (
        "min_recall[defect] ≥ 0.99 by juice, hold_for_inspector: its μ is added to "
        "loss[pack_premium][defect], loss[pack_standard][defect]"
    ) in result.output
