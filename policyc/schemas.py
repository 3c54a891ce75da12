"""JSON Schema of the policy language, generated from the pydantic models."""

from __future__ import annotations

import json
from typing import Any

from policyc.compiler.manifest import RuleManifest
from policyc.language.model import Policy

__all__ = ["MANIFEST_SCHEMA_ID", "POLICY_SCHEMA_ID", "manifest_schema_text", "policy_schema", "policy_schema_text"]

POLICY_SCHEMA_ID = "policy.schema.json"
MANIFEST_SCHEMA_ID = "rule-manifest.schema.json"


def policy_schema() -> dict[str, Any]:
    schema = Policy.model_json_schema()
    return {
        "$schema": "https://json-schema.org/draft/2020-12/schema",
        "$id": POLICY_SCHEMA_ID,
        "title": "policyc decision policy",
        **schema,
    }


def policy_schema_text() -> str:
    """Stable text: sorted keys, two-space indent, trailing newline (the checked-in file)."""
    return json.dumps(policy_schema(), indent=2, sort_keys=True) + "\n"


def manifest_schema_text() -> str:
    """The checked-in ``schemas/rule-manifest.schema.json``: the manifest inside every rule artefact."""
    schema = {
        "$schema": "https://json-schema.org/draft/2020-12/schema",
        "$id": MANIFEST_SCHEMA_ID,
        "title": "policyc rule manifest",
        **RuleManifest.model_json_schema(),
    }
    return json.dumps(schema, indent=2, sort_keys=True) + "\n"
