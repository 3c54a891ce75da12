"""Every JSON report has a JSON Schema generated from its class, checked in, and real reports follow it."""

from __future__ import annotations

import json
from functools import cache
from pathlib import Path

import pytest
from click.testing import CliRunner
from helpers import CLAIMS, PACKHOUSE, ROOT
from jsonschema import Draft202012Validator

from policyc.cli import main
from policyc.schemas import REPORT_SCHEMAS, report_schema_text

SCHEMAS = ROOT / "schemas"


@cache
def validator(name: str) -> Draft202012Validator:
    schema = json.loads((SCHEMAS / name).read_text(encoding="utf-8"))
    Draft202012Validator.check_schema(schema)
    return Draft202012Validator(schema)


def assert_follows(name: str, text: str) -> None:
    errors = sorted(validator(name).iter_errors(json.loads(text)), key=lambda e: list(e.absolute_path))
    assert [f"{list(e.absolute_path)}: {e.message}" for e in errors] == []


@pytest.mark.parametrize("name", REPORT_SCHEMAS)
def test_checked_in_report_schema_is_the_generated_one(name: str) -> None:
    # If this fails, regenerate: python -m policyc.schemas schemas
    assert (SCHEMAS / name).read_text(encoding="utf-8") == report_schema_text(name)


def report(*args: object) -> str:
    result = CliRunner().invoke(main, [str(a) for a in args] + ["--format", "json"])
    assert result.exit_code in (0, 1), result.stderr
    return result.stdout


@pytest.mark.parametrize(
    ("name", "command"),
    [
        ("check-report.schema.json", ["check", PACKHOUSE, CLAIMS]),
        ("inspect-report.schema.json", ["inspect", PACKHOUSE]),  # three classes: no posterior intervals
        ("inspect-report.schema.json", ["inspect", CLAIMS]),  # two classes: intervals
        ("priors-report.schema.json", ["priors", PACKHOUSE, PACKHOUSE.parent / "incoming.csv"]),
        (
            "evaluation-report.schema.json",
            ["evaluate", CLAIMS, CLAIMS.parent / "holdout.csv", "--label", "outcome", "--resamples", "100"],
        ),
        (
            "evaluation-report.schema.json",
            ["evaluate", PACKHOUSE, PACKHOUSE.parent / "holdout.csv", "--label", "grade", "--resamples", "100"],
        ),
        (
            "diff-report.schema.json",
            [
                "diff",
                PACKHOUSE,
                PACKHOUSE.parent / "policy-r4.yaml",
                "--data",
                PACKHOUSE.parent / "holdout.csv",
                "--label",
                "grade",
                "--max-flip-rate",
                "0",
                "--resamples",
                "100",
                "--simplex-samples",
                "256",
            ],
        ),
    ],
    ids=lambda part: part[0] if isinstance(part, list) else part,
)
def test_reports_follow_their_schema(name: str, command: list[object]) -> None:
    assert_follows(name, report(*command))


def test_a_check_report_with_findings_follows_its_schema(tmp_path: Path) -> None:
    broken = tmp_path / "policy.yaml"
    broken.write_text("policy: p\nclasses: [a, b]\npriors: {a: 0.5, b: 0.6}\n", encoding="utf-8")
    text = report("check", broken)
    assert json.loads(text) and all(d["severity"] == "error" for d in json.loads(text))
    assert_follows("check-report.schema.json", text)


def test_the_schema_catches_a_report_of_the_wrong_shape() -> None:
    good = json.loads(report("inspect", CLAIMS))
    bad = {**good, "classes": "legitimate"}
    assert not validator("inspect-report.schema.json").is_valid(bad)
    assert validator("inspect-report.schema.json").is_valid(good)
