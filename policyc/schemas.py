"""JSON Schema of the policy language, generated from the pydantic models."""

from __future__ import annotations

import json
from typing import Any

from policyc.model import Policy

__all__ = ["POLICY_SCHEMA_ID", "policy_schema", "policy_schema_text"]

POLICY_SCHEMA_ID = "policy.schema.json"


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
