"""The rule manifest schema is generated from its model, checked in, and describes real artefacts."""

from __future__ import annotations

import json
import zipfile
from pathlib import Path

import jsonschema
import pytest

from policyc.compiler import write_artefact
from policyc.compiler.build import compile_policy
from policyc.schemas import manifest_schema_text

ROOT = Path(__file__).resolve().parents[2]
SCHEMA = ROOT / "schemas" / "rule-manifest.schema.json"


def test_checked_in_manifest_schema_matches_the_model() -> None:
    assert SCHEMA.read_text(encoding="utf-8") == manifest_schema_text(), (
        "regenerate with: python -c 'from policyc.schemas import manifest_schema_text as t; print(t(), end=\"\")'"
        " > schemas/rule-manifest.schema.json"
    )


@pytest.mark.parametrize("scenario", ["packhouse", "claims"])
def test_demo_artefact_manifests_validate(scenario: str, tmp_path: Path) -> None:
    rule_file = tmp_path / f"{scenario}.rule"
    write_artefact(compile_policy(ROOT / "policies-demo" / scenario / "policy.yaml").rule, rule_file)
    manifest = json.loads(zipfile.ZipFile(rule_file).read("manifest.json"))
    jsonschema.Draft202012Validator(json.loads(SCHEMA.read_text(encoding="utf-8"))).validate(manifest)
    broken = {**manifest, "invalid_input": "ignore"}
    with pytest.raises(jsonschema.ValidationError):
        jsonschema.validate(broken, json.loads(SCHEMA.read_text(encoding="utf-8")))
