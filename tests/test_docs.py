"""The docs stay true: every diagnostic code the sources can emit is documented in the README."""

from __future__ import annotations

import re
from pathlib import Path

from policyc.language.model import _PYDANTIC_CODES

ROOT = Path(__file__).resolve().parents[1]
EMITTING_CALL = re.compile(
    r'(?:_error|_warning|_Refusal|FitProblem|Diagnostic|_source_error)\(\s*(?:name,\s*)?"([a-z0-9]+(?:-[a-z0-9]+)+)"',
    re.S,
)


def _emitted_codes() -> set[str]:
    codes = set(_PYDANTIC_CODES.values())
    for path in (ROOT / "policyc").rglob("*.py"):
        codes |= set(EMITTING_CALL.findall(path.read_text(encoding="utf-8")))
    return codes


def _documented_codes() -> set[str]:
    readme = (ROOT / "README.md").read_text(encoding="utf-8")
    table = readme.split("### Diagnostics", 1)[1].split("\n## ", 1)[0]
    return {
        code
        for row in table.splitlines()
        if row.startswith("| `")
        for code in re.findall(r"`([a-z0-9-]+)`", row.split("|")[1])
    }


def test_every_emitted_code_has_a_readme_example() -> None:
    emitted = _emitted_codes()
    assert len(emitted) > 40  # the scan itself works
    assert emitted - _documented_codes() == set()


def test_ci_runs_the_readme_test_command() -> None:
    readme = (ROOT / "README.md").read_text(encoding="utf-8")
    ci = (ROOT / ".ci" / "run").read_text(encoding="utf-8")
    assert "python -m pytest -q" in readme
    assert "\npython -m pytest -q\n" in ci


def _promised_tests() -> list[str]:
    readme = (ROOT / "README.md").read_text(encoding="utf-8")
    section = readme.split("## What policyc promises under bad input", 1)[1].split("\n## ", 1)[0]
    return re.findall(r"`(tests/[\w/]+\.py::test_\w+)`", section)


def test_every_promise_under_bad_input_names_a_test_that_exists() -> None:
    promised = _promised_tests()
    assert len(promised) >= 5  # the section and its table are there
    for reference in promised:
        file, name = reference.split("::")
        source = (ROOT / file).read_text(encoding="utf-8") if (ROOT / file).is_file() else ""
        assert re.search(rf"^\s*def {name}\(", source, re.M), f"README promise names a missing test: {reference}"


def _readme_hints() -> dict[str, str]:
    readme = (ROOT / "README.md").read_text(encoding="utf-8")
    table = readme.split("### Diagnostics", 1)[1].split("\n## ", 1)[0]
    hints = {}
    for row in table.splitlines():
        if row.startswith("| `"):
            cells = [cell.strip() for cell in row.strip().strip("|").split("|")]
            hints |= dict.fromkeys(re.findall(r"`([a-z0-9-]+)`", cells[0]), cells[-1])
    return hints


def test_every_code_carries_the_readme_tables_advice() -> None:
    # the JSON hint is never null where the table has one: Diagnostic falls back to HINTS, which is the table
    from policyc.language.diagnostics import Diagnostic, Severity
    from policyc.language.hints import HINTS

    assert _readme_hints() == HINTS
    for code, advice in HINTS.items():
        assert Diagnostic(code, Severity.ERROR, "m").hint == advice
    assert Diagnostic("unknown-key", Severity.ERROR, "m", hint="its own").hint == "its own"
