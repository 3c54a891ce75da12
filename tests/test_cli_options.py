"""One spelling per option across commands: --label, --format, -o/--output, --quiet; rules or policies alike."""

from __future__ import annotations

import json
from pathlib import Path

import pytest
from click.testing import CliRunner
from helpers import PACKHOUSE

from policyc.cli import main

HOLDOUT = PACKHOUSE.parent / "holdout.csv"
INCOMING = PACKHOUSE.parent / "incoming.csv"


def invoke(*args: object) -> tuple[int, str, str]:
    result = CliRunner().invoke(main, [str(a) for a in args])
    return result.exit_code, result.stdout, result.stderr


def test_every_command_that_reads_true_classes_spells_it_label() -> None:
    for command in (["diff"], ["evaluate"], ["plot", "regions"], ["plot", "curve"]):
        code, out, _ = invoke(*command, "--help")
        assert code == 0 and "--label COL" in out and "--labels" not in out


def test_the_old_diff_spelling_still_works_and_says_it_is_deprecated() -> None:
    args = ["diff", PACKHOUSE, PACKHOUSE, "--data", HOLDOUT, "--format", "json", "--resamples", "100"]
    old_code, old_out, old_err = invoke(*args, "--labels", "grade")
    new_code, new_out, new_err = invoke(*args, "--label", "grade")
    assert old_code == new_code == 0 and "--labels is deprecated" in old_err and "deprecated" not in new_err
    assert json.loads(old_out) == json.loads(new_out)
    code, _, err = invoke(*args, "--labels", "grade", "--label", "grade")
    assert code == 2 and "give --label only" in err


@pytest.mark.parametrize(
    "command",
    [
        ["check", PACKHOUSE],
        ["inspect", PACKHOUSE],
        ["priors", PACKHOUSE, INCOMING],
        ["evaluate", PACKHOUSE, HOLDOUT, "--label", "grade", "--resamples", "100"],
        ["diff", PACKHOUSE, PACKHOUSE],
    ],
    ids=lambda command: str(command[0]),
)
def test_every_report_command_writes_its_report_with_o(tmp_path: Path, command: list[object]) -> None:
    report = tmp_path / "report.json"
    code, out, err = invoke(*command, "--format", "json", "-o", report)
    assert code == 0, err
    assert out == "" and f"report -> {report}" in err
    json.loads(report.read_text(encoding="utf-8"))


@pytest.mark.parametrize(
    "command",
    [
        ["compile", PACKHOUSE, "-o", "{tmp}/rule"],
        ["decide", PACKHOUSE, INCOMING, "-o", "{tmp}/out.csv"],
        ["priors", PACKHOUSE, INCOMING],
    ],
    ids=lambda command: str(command[0]),
)
def test_quiet_is_accepted_by_every_command_with_progress(tmp_path: Path, command: list[object]) -> None:
    code, _, err = invoke(*[str(part).format(tmp=tmp_path) for part in command], "--quiet")
    assert code == 0, err


@pytest.mark.parametrize("command", [["inspect"], ["decide", INCOMING, "-o", "{tmp}/out.csv"], ["priors", INCOMING]])
def test_decide_inspect_and_priors_take_a_policy_file_like_diff_evaluate_and_plot(
    tmp_path: Path, command: list[object]
) -> None:
    rule = tmp_path / "packhouse.rule"
    assert invoke("compile", PACKHOUSE, "-o", rule)[0] == 0
    rest = [str(part).format(tmp=tmp_path) for part in command[1:]]
    from_rule = invoke(command[0], rule, *rest)
    from_policy = invoke(command[0], PACKHOUSE, *rest)
    assert from_rule[0] == from_policy[0] == 0
    if command[0] == "inspect":  # the same rule, so the same manifest and hashes
        assert from_rule[1] == from_policy[1]


def test_the_progress_display_counts_each_pass_on_its_own_line(capsys: pytest.CaptureFixture[str]) -> None:
    from policyc.cli import _ProgressDisplay

    display = _ProgressDisplay("fitting")
    for stage in ("pass 1 of 2", "pass 2 of 2"):
        display(3, None, stage)
        display(2, None, stage)
    display.close()
    shown = capsys.readouterr().err
    assert "fitting (pass 1 of 2): 5 rows" in shown and "fitting (pass 2 of 2): 5 rows" in shown
    assert "10 rows" not in shown
