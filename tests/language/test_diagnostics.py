"""Diagnostics: key-path rendering, text and JSON renderers, PolicyError summary, headline choice."""

from __future__ import annotations

import json

import pytest

from policyc.language.diagnostics import (
    CompileError,
    Diagnostic,
    PolicyCheckError,
    PolicyError,
    PolicySchemaError,
    PolicySourceError,
    Position,
    Severity,
    headline,
    json_path,
    render_json,
    render_text,
)


def diag(
    code: str = "some-code",
    severity: Severity = Severity.ERROR,
    path: tuple[str | int, ...] = (),
    line: int | None = None,
    col: int | None = None,
    file: str | None = "policy.yaml",
    hint: str | None = None,
    message: str = "do something",
) -> Diagnostic:
    return Diagnostic(code, severity, message, path, file, line, col, hint)


# --- json_path -----------------------------------------------------------------------------------


@pytest.mark.parametrize(
    ("path", "rendered"),
    [
        ((), "$"),
        (("loss",), "$.loss"),
        (("loss", "juice", 2), "$.loss.juice[2]"),
        (("loss", 2, 0), "$.loss[2][0]"),
        (("a b",), '$["a b"]'),
        (("loss", "pack premium", "defect"), '$.loss["pack premium"].defect'),
        (("evidence", "log-likelihood"), '$.evidence["log-likelihood"]'),
        (("priors", "0"), '$.priors["0"]'),
        (('say "hi"',), '$["say \\"hi\\""]'),
        (("",), '$[""]'),
        (("_private", "snake_case9"), "$._private.snake_case9"),
    ],
)
def test_json_path(path: tuple[str | int, ...], rendered: str) -> None:
    assert json_path(path) == rendered


# --- render_text ---------------------------------------------------------------------------------


def test_render_text_line_format() -> None:
    diagnostic = diag("unreachable-action", Severity.WARNING, ("loss", "juice"), 12, 5, message="lower its losses")
    assert render_text([diagnostic]) == (
        "policy.yaml:12:5: warning[unreachable-action] lower its losses (at $.loss.juice)\n"
        "    hint: no posterior makes it the cheapest"  # the README table's advice for the code
    )


def test_render_text_without_path_line_or_file() -> None:
    assert render_text([diag(file=None)]) == "<policy>: error[some-code] do something"
    assert render_text([diag(line=3)]) == "policy.yaml:3: error[some-code] do something"


def test_render_text_one_line_per_diagnostic_plus_hints() -> None:
    text = render_text(
        [
            diag("first", line=1, col=1),
            diag("second", Severity.INFO, ("priors",), 2, 9, hint="add sha256:"),
        ]
    )
    assert text.splitlines() == [
        "policy.yaml:1:1: error[first] do something",
        "policy.yaml:2:9: info[second] do something (at $.priors)",
        "    hint: add sha256:",
    ]


def test_render_text_caret_excerpt() -> None:
    lines = {"policy.yaml": ["policy: p", "priors: {a: 0.6, b: 0.6}"]}
    text = render_text([diag("priors-do-not-sum-to-one", line=2, col=9)], lines, show_source=True)
    assert text.splitlines() == [
        "policy.yaml:2:9: error[priors-do-not-sum-to-one] do something",
        "    hint: they sum to 1 (±10⁻⁶)",
        "    priors: {a: 0.6, b: 0.6}",
        "            ^",
    ]


def test_render_text_excerpt_only_when_asked_and_possible() -> None:
    lines = {"policy.yaml": ["policy: p"]}
    located = diag(line=1, col=9)
    assert len(render_text([located], lines, show_source=False).splitlines()) == 1
    # Line beyond the file, no line, or a file without source: no excerpt and no crash.
    assert len(render_text([diag(line=5, col=1)], lines, show_source=True).splitlines()) == 1
    assert len(render_text([diag()], lines, show_source=True).splitlines()) == 1
    assert len(render_text([diag(file="other.yaml", line=1, col=1)], lines, show_source=True).splitlines()) == 1


def test_render_text_of_nothing_is_empty() -> None:
    assert render_text([]) == ""


# --- render_json ---------------------------------------------------------------------------------


def test_render_json_stable_shape() -> None:
    diagnostics = [
        diag("dominated-action", Severity.WARNING, ("loss", "juice", 0), 7, 3, hint="remove it"),
        diag("policy-empty", file=None),
        diag("not-a-documented-code", file=None),
    ]
    data = json.loads(render_json(diagnostics))
    assert isinstance(data, list) and len(data) == 3
    keys = {"code", "severity", "message", "path", "file", "line", "col", "hint"}
    assert all(set(item) == keys for item in data)
    assert data[0] == {
        "code": "dominated-action",
        "severity": "warning",
        "message": "do something",
        "path": "$.loss.juice[0]",
        "file": "policy.yaml",
        "line": 7,
        "col": 3,
        "hint": "remove it",
    }
    assert data[1]["path"] == "$"
    assert data[1]["file"] is None and data[1]["line"] is None and data[1]["hint"] == "write the policy"
    assert data[2]["hint"] is None  # no advice in the README's table


def test_render_json_of_nothing_is_an_empty_list() -> None:
    assert json.loads(render_json([])) == []


# --- Diagnostic ----------------------------------------------------------------------------------


def test_located_takes_the_nearest_ancestor_position() -> None:
    positions = {(): Position(1, 1), ("loss",): Position(4, 3), ("loss", "juice"): Position(6, 10)}
    keys = {("loss",): Position(3, 1)}
    deep = diag(path=("loss", "juice", "defect"), file=None).located("f.yaml", positions, keys)
    assert (deep.file, deep.line, deep.col) == ("f.yaml", 6, 10)
    missing = diag(path=("priors", "a"), file=None).located("f.yaml", positions, keys)
    assert (missing.line, missing.col) == (1, 1)
    nowhere = diag(path=("x",), file=None).located("f.yaml", {}, {})
    assert (nowhere.file, nowhere.line, nowhere.col) == ("f.yaml", None, None)


def test_diagnostic_is_frozen_and_knows_errors() -> None:
    diagnostic = diag()
    assert diagnostic.is_error
    assert not diag(severity=Severity.WARNING).is_error
    with pytest.raises(AttributeError):
        diagnostic.code = "other"  # type: ignore[misc]


# --- PolicyError ---------------------------------------------------------------------------------


def test_policy_error_str_shows_every_diagnostic_up_to_five() -> None:
    error = PolicyError([diag(f"code-{i}", line=i + 1) for i in range(5)])
    lines = str(error).splitlines()
    assert len(lines) == 5
    assert lines[0] == "policy.yaml:1: error[code-0] do something"
    assert "more" not in str(error)


def test_policy_error_str_shows_first_five_then_count() -> None:
    error = PolicyError([diag(f"code-{i}", line=i + 1, col=1) for i in range(8)])
    lines = str(error).splitlines()
    assert len(lines) == 6
    assert [line.split("[")[1].split("]")[0] for line in lines[:5]] == [f"code-{i}" for i in range(5)]
    assert lines[5] == "... and 3 more"
    assert error.codes == [f"code-{i}" for i in range(8)]
    assert len(error.diagnostics) == 8


@pytest.mark.parametrize("kind", [PolicySourceError, PolicySchemaError, PolicyCheckError, CompileError])
def test_every_stage_error_is_a_policy_error(kind: type[PolicyError]) -> None:
    with pytest.raises(PolicyError, match=r"error\[bad-thing\]"):
        raise kind([diag("bad-thing", line=2, col=1)])


# --- headline ------------------------------------------------------------------------------------


def test_headline_prefers_errors_over_warnings() -> None:
    warning = diag("shallow-warning", Severity.WARNING, ())
    error = diag("deep-error", Severity.ERROR, ("a", "b", "c"))
    assert headline([warning, error]) is error


def test_headline_prefers_shallow_paths_among_errors() -> None:
    deep = diag("deep", path=("loss", "juice", "defect"))
    shallow = diag("shallow", path=("loss",))
    info = diag("info", Severity.INFO, ())
    assert headline([deep, info, shallow]) is shallow


def test_headline_keeps_the_first_of_equals_and_handles_empty() -> None:
    first = diag("first", path=("a",))
    second = diag("second", path=("b",))
    assert headline([first, second]) is first
    assert headline([]) is None
