"""JSON Schemas generated from the models: the policy language, the rule manifest and every JSON report.

The checked-in files in ``schemas/`` are this module's output; a test fails when they drift. Regenerate all
of them with ``python -m policyc.schemas schemas``.
"""

from __future__ import annotations

import json
import sys
from collections.abc import Callable
from pathlib import Path
from typing import Any

from policyc.compiler.manifest import RuleManifest
from policyc.language.model import Policy

__all__ = [
    "MANIFEST_SCHEMA_ID",
    "POLICY_SCHEMA_ID",
    "REPORT_SCHEMAS",
    "manifest_schema_text",
    "policy_schema",
    "policy_schema_text",
    "report_schema",
    "report_schema_text",
    "write_schemas",
]

POLICY_SCHEMA_ID = "policy.schema.json"
MANIFEST_SCHEMA_ID = "rule-manifest.schema.json"
DIALECT = "https://json-schema.org/draft/2020-12/schema"


def _report_types() -> dict[str, tuple[str, Any]]:
    """Schema file name -> (title, report type); the review tools are imported only when asked for."""
    from policyc.language.report import CheckReportData
    from policyc.review.diff import DiffReport
    from policyc.review.evaluate.evaluation import Evaluation
    from policyc.review.inspect import Inspection
    from policyc.review.priors import PriorEstimate

    return {
        "check-report.schema.json": ("policyc check --format json", CheckReportData),
        "diff-report.schema.json": ("policyc diff --format json", DiffReport),
        "evaluation-report.schema.json": ("policyc evaluate --format json", Evaluation),
        "priors-report.schema.json": ("policyc priors --format json", PriorEstimate),
        "inspect-report.schema.json": ("policyc inspect --format json", Inspection),
    }


REPORT_SCHEMAS = (
    "check-report.schema.json",
    "diff-report.schema.json",
    "evaluation-report.schema.json",
    "priors-report.schema.json",
    "inspect-report.schema.json",
)


def _text(schema: dict[str, Any]) -> str:
    """Stable text: sorted keys, two-space indent, trailing newline (the checked-in file)."""
    return json.dumps(schema, indent=2, sort_keys=True) + "\n"


def policy_schema() -> dict[str, Any]:
    return {
        "$schema": DIALECT,
        "$id": POLICY_SCHEMA_ID,
        "title": "policyc decision policy",
        **Policy.model_json_schema(),
    }


def policy_schema_text() -> str:
    return _text(policy_schema())


def manifest_schema_text() -> str:
    """The checked-in ``schemas/rule-manifest.schema.json``: the manifest inside every rule artefact."""
    schema = {"$schema": DIALECT, "$id": MANIFEST_SCHEMA_ID, "title": "policyc rule manifest"}
    return _text({**schema, **RuleManifest.model_json_schema()})


def _numbers_may_be_null(node: Any) -> Any:
    """The serializer writes NaN and infinity as null (:func:`policyc.render.dumps`), so every number may be null."""
    if isinstance(node, dict):
        updated = {key: _numbers_may_be_null(value) for key, value in node.items()}
        if updated.get("type") == "number":
            updated["type"] = ["number", "null"]
        return updated
    if isinstance(node, list):
        return [_numbers_may_be_null(item) for item in node]
    return node


def report_schema(name: str) -> dict[str, Any]:
    """The JSON Schema of one report, from the report's own class as the one serializer writes it."""
    from pydantic import TypeAdapter

    title, report_type = _report_types()[name]
    generated = TypeAdapter(report_type).json_schema(mode="serialization", by_alias=True)
    return {"$schema": DIALECT, "$id": name, **_numbers_may_be_null(generated), "title": title}


def report_schema_text(name: str) -> str:
    return _text(report_schema(name))


def write_schemas(directory: Path) -> list[Path]:
    texts: dict[str, Callable[[], str]] = {
        POLICY_SCHEMA_ID: policy_schema_text,
        MANIFEST_SCHEMA_ID: manifest_schema_text,
        **{name: (lambda name=name: report_schema_text(name)) for name in REPORT_SCHEMAS},  # type: ignore[misc]
    }
    written = []
    for name, text in texts.items():
        (directory / name).write_text(text(), encoding="utf-8")
        written.append(directory / name)
    return written


if __name__ == "__main__":  # pragma: no cover
    for path in write_schemas(Path(sys.argv[1] if len(sys.argv) > 1 else "schemas")):
        print(path)
