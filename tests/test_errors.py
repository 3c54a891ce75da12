"""One error family: every refusal is a PolicycError that carries its exit code and presents itself."""

from __future__ import annotations

import json
import subprocess
import sys
from pathlib import Path

import numpy as np
import pytest
from click.testing import CliRunner
from helpers import PACKHOUSE

from policyc import errors
from policyc.cli import main
from policyc.compiler.build import compile_policy
from policyc.evidence.io import DataError as ReExportedDataError
from policyc.language.diagnostics import (
    CompileError,
    Diagnostic,
    PolicyCheckError,
    PolicyError,
    PolicySchemaError,
    PolicySourceError,
    Severity,
)
from policyc.review.plot import PlotError
from policyc.runtime import ArtefactError, InputError, PolicycError, load_rule

STAGE_ERRORS = {
    ArtefactError: "runtime",
    InputError: "runtime",
    PolicySourceError: "language",
    PolicySchemaError: "language",
    PolicyCheckError: "language",
    errors.DataError: "evidence",
    errors.FitProblem: "evidence",
    CompileError: "compiler",
    errors.ReviewError: "review",
    PlotError: "review",
}


def make(kind: type[PolicycError]) -> PolicycError:
    if issubclass(kind, PolicyError):
        return kind([Diagnostic("bad-thing", Severity.ERROR, "do something", ("priors",), "p.yaml", 3, 5, "a hint")])
    if kind is errors.FitProblem:
        return errors.FitProblem("too-few-rows", "class 'a' has 1 training row", "add rows")
    return kind("p.csv: something is wrong")


@pytest.mark.parametrize("kind", list(STAGE_ERRORS), ids=lambda kind: kind.__name__)
def test_every_stage_error_belongs_to_the_family_with_exit_code_1(kind: type[PolicycError]) -> None:
    error = make(kind)
    assert isinstance(error, errors.PolicycError) and error.exit_code == 1 and error.stage == STAGE_ERRORS[kind]
    shown = error.as_json()
    assert shown["error"] == kind.__name__ and shown["stage"] == STAGE_ERRORS[kind] and shown["exit_code"] == 1
    json.dumps(shown)  # presentable as JSON as it stands


def test_one_family_one_base_exported_from_both_places() -> None:
    assert errors.PolicycError is PolicycError and errors.ArtefactError is ArtefactError
    assert errors.InputError is InputError and ReExportedDataError is errors.DataError


def test_policy_errors_present_their_located_diagnostics_with_hints() -> None:
    error = make(PolicyCheckError)
    assert error.as_text() == "p.yaml:3:5: error[bad-thing] do something (at $.priors)\n    hint: a hint"
    diagnostics = error.as_json()["diagnostics"]
    assert isinstance(diagnostics, list) and diagnostics[0]["code"] == "bad-thing" and diagnostics[0]["line"] == 3


def test_plain_errors_present_one_line() -> None:
    assert make(errors.DataError).as_text() == "error: p.csv: something is wrong"


def test_the_kernel_input_error_reaches_callers_as_the_runtime_one() -> None:
    # the kernel (numpy only, copied into standalone modules) raises its own class; the runtime's is in the family
    rule = compile_policy(PACKHOUSE).rule
    with pytest.raises(InputError) as raised:
        rule.decide(np.zeros((2, len(rule.features) + 1)))
    assert isinstance(raised.value, PolicycError) and "feature columns" in raised.value.message


def test_the_runtime_errors_still_load_with_numpy_and_the_standard_library_only(tmp_path: Path) -> None:
    script = "import json, sys; import policyc.runtime.errors; print(json.dumps(sorted(sys.modules)))"
    loaded = json.loads(subprocess.run([sys.executable, "-c", script], capture_output=True, check=True).stdout)
    assert not {m for m in loaded if m.split(".")[0] in {"click", "pydantic", "yaml", "scipy", "pyarrow"}}
    assert "policyc.errors" not in loaded


def test_a_fit_problem_is_located_at_the_key_it_names(tmp_path: Path) -> None:
    # the compiler does not know which codes belong where: the fit problem says
    text = PACKHOUSE.read_text(encoding="utf-8")
    (tmp_path / "policy.yaml").write_text(text[: text.index("    sha256:")], encoding="utf-8")
    rows = (PACKHOUSE.parent / "train.csv").read_text(encoding="utf-8")
    (tmp_path / "train.csv").write_text(rows + "45.8,0.47,185.3,12.58,bruised\n", encoding="utf-8")
    with pytest.raises(CompileError) as raised:
        compile_policy(tmp_path / "policy.yaml")
    diagnostic = raised.value.diagnostics[0]
    assert diagnostic.code == "unknown-label" and diagnostic.path == ("evidence", "training")
    assert diagnostic.line == 24 and diagnostic.hint is not None  # the line of `training:`


# --- the command line catches the family in one place ------------------------------------------


def invoke(*args: object) -> tuple[int, str, str]:
    result = CliRunner().invoke(main, [str(a) for a in args])
    assert "Traceback" not in result.stderr
    assert result.exception is None or isinstance(result.exception, SystemExit)
    return result.exit_code, result.stdout, result.stderr


@pytest.mark.parametrize(
    "command",
    [
        ["inspect", "{missing}"],
        ["decide", "{missing}", PACKHOUSE.parent / "incoming.csv", "-o", "{out}"],
        ["priors", "{missing}", PACKHOUSE.parent / "incoming.csv"],
        ["evaluate", "{missing}", PACKHOUSE.parent / "holdout.csv", "--label", "grade"],
        ["plot", "simplex", "{missing}", "-o", "{out}"],
    ],
    ids=lambda command: command[0] if command[0] != "plot" else "plot",
)
def test_every_command_but_diff_exits_1_on_an_unusable_input(tmp_path: Path, command: list[object]) -> None:
    missing, out = tmp_path / "absent.rule", tmp_path / "out.csv"
    args = [str(a).format(missing=missing, out=out) for a in command]
    code, _, stderr = invoke(*args)
    assert code == 1 and "absent.rule" in stderr and stderr.startswith("error: ")


def test_json_format_presents_the_error_as_json_on_stderr(tmp_path: Path) -> None:
    code, stdout, stderr = invoke("inspect", tmp_path / "absent.rule", "--format", "json")
    error = json.loads(stderr)
    assert code == 1 and stdout == ""
    assert error == {
        "error": "ArtefactError",
        "stage": "runtime",
        "message": f"{tmp_path / 'absent.rule'}: cannot read: No such file or directory",
        "exit_code": 1,
    }


def test_compile_presents_a_policy_error_as_located_diagnostics(tmp_path: Path) -> None:
    broken = tmp_path / "policy.yaml"
    broken.write_text(PACKHOUSE.read_text(encoding="utf-8").replace("priors:", "priorz:", 1), encoding="utf-8")
    code, _, stderr = invoke("compile", broken, "-o", tmp_path / "rule")
    assert code == 1 and f"{broken}:" in stderr and "error[" in stderr
    with pytest.raises(ArtefactError):
        load_rule(tmp_path / "rule")  # nothing written


def test_help_states_the_exit_codes() -> None:
    code, stdout, _ = invoke("--help")
    assert code == 0 and "Exit codes:" in stdout and "trouble" in stdout
