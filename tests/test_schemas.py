"""The checked-in policy schema is generated from the models, and the demo policies follow it."""

from __future__ import annotations

import copy
import json
from collections.abc import Iterable, Iterator
from pathlib import Path
from typing import Any

import pytest
from jsonschema import Draft202012Validator, ValidationError
from pydantic import TypeAdapter
from pydantic import ValidationError as PydanticValidationError

from policyc.language.model import Name
from policyc.language.source import load_source
from policyc.schemas import POLICY_SCHEMA_ID, policy_schema, policy_schema_text

ROOT = Path(__file__).resolve().parent.parent
SCHEMA_FILE = ROOT / "schemas" / "policy.schema.json"
DEMOS = sorted((ROOT / "policies-demo").glob("*/policy*.yaml"))


def as_json(data: Any) -> Any:
    """The loader's tuples as JSON arrays, which is what a JSON Schema validator expects."""
    if isinstance(data, dict):
        return {key: as_json(value) for key, value in data.items()}
    if isinstance(data, tuple | list):
        return [as_json(value) for value in data]
    return data


def walk(errors: Iterable[ValidationError]) -> Iterator[ValidationError]:
    """Errors and, for anyOf/oneOf, the errors of each branch."""
    for error in errors:
        yield error
        yield from walk(error.context or [])


@pytest.fixture(scope="module")
def validator() -> Draft202012Validator:
    schema = json.loads(SCHEMA_FILE.read_text(encoding="utf-8"))
    Draft202012Validator.check_schema(schema)
    return Draft202012Validator(schema)


def demo_data(name: str) -> dict[str, Any]:
    return as_json(load_source(ROOT / "policies-demo" / name / "policy.yaml").data)


def test_checked_in_schema_is_the_generated_one() -> None:
    # If this fails, regenerate: policyc schema > schemas/policy.schema.json
    assert SCHEMA_FILE.read_text(encoding="utf-8") == policy_schema_text()


def test_schema_text_is_stable_and_declares_its_dialect() -> None:
    assert policy_schema_text() == policy_schema_text()
    assert policy_schema_text().endswith("}\n")
    schema = policy_schema()
    assert schema["$schema"] == "https://json-schema.org/draft/2020-12/schema"
    assert schema["$id"] == POLICY_SCHEMA_ID
    assert set(schema["required"]) >= {"policy", "classes", "priors", "actions", "evidence"}
    assert schema["additionalProperties"] is False


@pytest.mark.parametrize("path", DEMOS, ids=[p.parent.name for p in DEMOS])
def test_demo_policies_validate_against_the_schema(path: Path, validator: Draft202012Validator) -> None:
    errors = [error.message for error in validator.iter_errors(as_json(load_source(path).data))]
    assert errors == []


def test_there_are_demo_policies() -> None:
    assert {p.parent.name for p in DEMOS} >= {"claims", "packhouse"}


@pytest.mark.parametrize(
    ("change", "where"),
    [
        (lambda d: d.update(colour="red"), ()),
        (lambda d: d["loss"]["juice"].update(defect="1"), ("loss", "juice", "defect")),
        (lambda d: d.update(invalid_input="drop"), ("invalid_input",)),
        (lambda d: d["evidence"].update(kind="magic"), ("evidence",)),
        (lambda d: d.pop("actions"), ()),
        (lambda d: d.update(revision=-1), ("revision",)),
        (lambda d: d["evidence"].update(shrinkage=1.5), ("evidence",)),
        (lambda d: d.update(policy="two words"), ("policy",)),
    ],
    ids=[
        "unknown-key",
        "quoted-number",
        "unknown-choice",
        "unknown-kind",
        "missing-key",
        "negative-revision",
        "shrinkage-above-one",
        "malformed-identifier",
    ],
)
def test_a_bad_policy_fails_validation(change: Any, where: tuple[str, ...], validator: Draft202012Validator) -> None:
    data = copy.deepcopy(demo_data("packhouse"))
    change(data)
    errors = list(validator.iter_errors(data))
    assert errors, "the schema accepted a bad policy"
    paths = [tuple(error.absolute_path) for error in walk(errors)]
    assert any(path[: len(where)] == where for path in paths), paths


def test_schema_describes_both_matrix_keys_and_every_evidence_kind() -> None:
    schema = policy_schema()
    assert {"loss", "gain", "reject"} <= set(schema["properties"])
    text = json.dumps(schema)
    for kind in ("gaussian", "posterior", "log-likelihood"):
        assert f'"{kind}"' in text


@pytest.mark.parametrize(
    "name", ["premium", "café 2", "a", "x" * 200, "", " lead", "trail ", "tab\tinside", "bell\x07", "x" * 201, 7]
)
def test_schema_and_model_agree_on_names(name: object) -> None:
    # The schema had no pattern for names, so editors accepted names the loader refuses.
    schema = json.loads(SCHEMA_FILE.read_text(encoding="utf-8"))
    name_schemas = [
        schema["properties"]["classes"]["items"],
        schema["properties"]["actions"]["items"],
        schema["$defs"]["TrainingData"]["properties"]["label"],
    ]
    try:
        TypeAdapter(Name).validate_python(name, strict=True)
    except PydanticValidationError:
        model_accepts = False
    else:
        model_accepts = True
    assert [Draft202012Validator(s).is_valid(name) for s in name_schemas] == [model_accepts] * 3, name
