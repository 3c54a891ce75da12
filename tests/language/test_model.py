"""The policy model: valid data builds a Policy; shape errors become located diagnostics."""

from __future__ import annotations

import numpy as np
import pytest

from policyc.language.diagnostics import PolicySchemaError, Severity
from policyc.language.model import GaussianEvidence, LogLikelihoodEvidence, Policy, PosteriorEvidence, build_policy
from policyc.language.source import parse_source

# Line numbers in the tests below refer to this text.
BASE = """\
policy: grading
classes: [premium, standard, defect]
priors: {premium: 0.55, standard: 0.35, defect: 0.10}
actions: [pack, juice]
loss:
  pack:  {premium: 0, standard: 4, defect: 30}
  juice: {premium: 6, standard: 3, defect: 1}
evidence:
  kind: log-likelihood
  columns: {premium: l_p, standard: l_s, defect: l_d}
"""


def build(text: str) -> Policy:
    return build_policy(parse_source(text, "p.yaml"))


def schema_errors(text: str) -> list[tuple[str, int | None, int | None]]:
    with pytest.raises(PolicySchemaError) as info:
        build(text)
    assert all(d.severity is Severity.ERROR and d.file == "p.yaml" for d in info.value.diagnostics)
    return [(d.code, d.line, d.col) for d in info.value.diagnostics]


# --- valid policies ------------------------------------------------------------------------------


def test_build_policy_on_valid_data() -> None:
    policy = build(BASE)
    assert policy.policy == "grading"
    assert policy.revision == 0
    assert policy.classes == ("premium", "standard", "defect")
    assert policy.actions == ("pack", "juice")
    assert policy.priors == {"premium": 0.55, "standard": 0.35, "defect": 0.10}
    assert policy.matrix_key == "loss"
    assert policy.reject is None and policy.reject_cost() is None
    assert policy.invalid_input == "error"
    assert isinstance(policy.evidence, LogLikelihoodEvidence)


def test_loss_matrix_rows_are_actions_and_columns_are_classes() -> None:
    # Keys in another order than classes:/actions: must not change the orientation.
    text = BASE.replace(
        "  pack:  {premium: 0, standard: 4, defect: 30}\n  juice: {premium: 6, standard: 3, defect: 1}\n",
        "  juice: {defect: 1, premium: 6, standard: 3}\n  pack:  {defect: 30, standard: 4, premium: 0}\n",
    )
    matrix = build(text).loss_matrix()
    assert matrix.shape == (2, 3)
    assert matrix.dtype == np.float64
    np.testing.assert_array_equal(matrix, [[0, 4, 30], [6, 3, 1]])


def test_gain_is_turned_into_loss_by_its_negative() -> None:
    text = BASE.replace("loss:", "gain:") + "reject: {action: hold, gain: 2.5}\n"
    policy = build(text)
    assert policy.matrix_key == "gain"
    assert policy.stated_matrix["pack"]["defect"] == 30
    np.testing.assert_array_equal(policy.loss_matrix(), [[0, -4, -30], [-6, -3, -1]])
    assert policy.reject_cost() == -2.5


def test_reject_cost_with_loss() -> None:
    policy = build(BASE + "reject: {action: hold, cost: 2.5}\n")
    assert policy.reject is not None and policy.reject.action == "hold"
    assert policy.reject_cost() == 2.5


def test_reject_action_defaults_to_reject() -> None:
    policy = build(BASE + "reject: {cost: 1}\n")
    assert policy.reject is not None and policy.reject.action == "reject"


@pytest.mark.parametrize(
    ("old", "new", "where"),
    [
        ("classes: [premium, standard, defect]", "classes: [premium, 7, defect]", (2, 20)),
        ("actions: [pack, juice]", "actions: [pack, 3.5]", (4, 17)),
        (
            "columns: {premium: l_p, standard: l_s, defect: l_d}",
            "columns: {premium: 1, standard: l_s, defect: l_d}",
            (10, 22),
        ),
    ],
    ids=["class", "action", "column"],
)
def test_numbers_are_not_names(old: str, new: str, where: tuple[int, int]) -> None:
    # Unquoted integers used to become text silently ("7"), though names are text everywhere else.
    with pytest.raises(PolicySchemaError) as info:
        build(BASE.replace(old, new))
    (diagnostic,) = info.value.diagnostics
    assert (diagnostic.code, diagnostic.line, diagnostic.col) == ("expected-text", *where)
    assert diagnostic.hint is not None and "quoted" in diagnostic.hint


def test_feature_and_label_names_must_be_text() -> None:
    text = BASE.replace(
        "  kind: log-likelihood\n  columns: {premium: l_p, standard: l_s, defect: l_d}\n",
        "  kind: gaussian\n  features: [mass, 2]\n  training: {data: t.csv, label: 5}\n",
    )
    assert schema_errors(text) == [("expected-text", 10, 20), ("expected-text", 11, 34)]


def test_quoted_numbers_are_names() -> None:
    text = """\
policy: digits
classes: ["0", "1"]
priors: {0: 0.5, 1: 0.5}
actions: ["0", "1"]
loss:
  0: {0: 0, 1: 1}
  1: {0: 1, 1: 0}
evidence: {kind: log-likelihood, columns: {0: l0, 1: l1}}
"""
    policy = build(text)
    assert policy.classes == ("0", "1")
    assert policy.actions == ("0", "1")
    np.testing.assert_array_equal(policy.loss_matrix(), [[0, 1], [1, 0]])


def test_priors_training_and_gaussian_evidence() -> None:
    text = BASE.replace("priors: {premium: 0.55, standard: 0.35, defect: 0.10}", "priors: training").replace(
        "  kind: log-likelihood\n  columns: {premium: l_p, standard: l_s, defect: l_d}\n",
        "  kind: gaussian\n  shrinkage: 0.2\n  features: [a, b]\n  training: {data: t.csv, label: grade}\n",
    )
    policy = build(text)
    assert policy.priors == "training"
    assert isinstance(policy.evidence, GaussianEvidence)
    assert policy.evidence.shrinkage == 0.2
    assert policy.evidence.covariance == "full"
    assert policy.evidence.training.sha256 is None


def test_posterior_evidence() -> None:
    text = BASE.replace(
        "  kind: log-likelihood\n",
        "  kind: posterior\n  trained_priors: {premium: 0.4, standard: 0.4, defect: 0.2}\n"
        "  calibration: {method: isotonic, score: {metric: brier, value: 0.1}}\n",
    )
    evidence = build(text).evidence
    assert isinstance(evidence, PosteriorEvidence)
    assert evidence.calibration is not None and evidence.calibration.method == "isotonic"
    assert evidence.sum_tolerance == 1e-6


def test_policy_is_frozen() -> None:
    policy = build(BASE)
    with pytest.raises(Exception, match="frozen"):
        policy.revision = 4  # type: ignore[misc]


# --- located schema errors -----------------------------------------------------------------------


def test_quoted_number_is_expected_number() -> None:
    text = BASE.replace("juice: {premium: 6,", "juice: {premium: '6',")
    assert schema_errors(text) == [("expected-number", 7, 20)]


def test_quoted_prior_is_expected_number() -> None:
    text = BASE.replace("{premium: 0.55,", "{premium: '0.55',")
    assert schema_errors(text) == [("expected-number", 3, 19)]


def test_boolean_is_not_a_number() -> None:
    text = BASE.replace("pack:  {premium: 0,", "pack:  {premium: true,")
    assert schema_errors(text) == [("expected-number", 6, 20)]


@pytest.mark.parametrize("value", [".inf", "-.inf", ".nan"])
def test_infinite_loss_is_not_finite(value: str) -> None:
    text = BASE.replace("defect: 30}", f"defect: {value}}}")
    assert schema_errors(text) == [("not-finite", 6, 44)]


def test_unknown_key_is_located_at_the_key() -> None:
    text = BASE.replace("actions: [pack, juice]\n", "actions: [pack, juice]\nactoins: [pack]\n")
    with pytest.raises(PolicySchemaError) as info:
        build(text)
    (diagnostic,) = info.value.diagnostics
    assert (diagnostic.code, diagnostic.line, diagnostic.col) == ("unknown-key", 5, 1)
    assert diagnostic.path == ("actoins",)
    assert "'actoins'" in diagnostic.message


def test_nested_unknown_key_is_located_at_the_key() -> None:
    text = BASE.replace("  kind: log-likelihood\n", "  kind: log-likelihood\n  colums: {}\n")
    assert schema_errors(text) == [("unknown-key", 10, 3)]


def test_missing_key_is_located_at_its_parent() -> None:
    text = BASE.replace("actions: [pack, juice]\n", "")
    with pytest.raises(PolicySchemaError) as info:
        build(text)
    (diagnostic,) = info.value.diagnostics
    assert (diagnostic.code, diagnostic.line, diagnostic.col) == ("missing-key", 1, 1)
    assert diagnostic.path == ("actions",)
    assert "'actions'" in diagnostic.message


def test_nested_missing_key() -> None:
    text = BASE.replace("  kind: log-likelihood\n", "  kind: gaussian\n  features: [a]\n").replace(
        "  columns: {premium: l_p, standard: l_s, defect: l_d}\n", ""
    )
    with pytest.raises(PolicySchemaError) as info:
        build(text)
    (diagnostic,) = info.value.diagnostics
    assert diagnostic.code == "missing-key"
    assert diagnostic.path == ("evidence", "training")
    assert diagnostic.line == 9  # the evidence mapping


def test_unknown_choice() -> None:
    assert schema_errors(BASE + "invalid_input: drop\n") == [("unknown-choice", 11, 16)]


def test_unknown_covariance_choice_inside_evidence() -> None:
    text = BASE.replace("  kind: log-likelihood\n", "  kind: gaussian\n  covariance: spherical\n").replace(
        "  columns: {premium: l_p, standard: l_s, defect: l_d}\n", "  features: [a]\n  training: {data: t, label: g}\n"
    )
    assert schema_errors(text) == [("unknown-choice", 10, 15)]


def test_unknown_evidence_kind() -> None:
    codes = [code for code, _, _ in schema_errors(BASE.replace("kind: log-likelihood", "kind: likelihood"))]
    assert codes == ["unknown-evidence-kind"]


def test_loss_and_gain_both_is_invalid() -> None:
    text = BASE + "gain:\n  pack: {premium: 0, standard: 0, defect: 0}\n  juice: {premium: 0, standard: 0, defect: 0}\n"
    with pytest.raises(PolicySchemaError, match="exactly one of loss: or gain:") as info:
        build(text)
    assert [(d.code, d.path) for d in info.value.diagnostics] == [("invalid-value", ())]


def test_neither_loss_nor_gain_is_invalid() -> None:
    text = BASE.replace(
        "loss:\n  pack:  {premium: 0, standard: 4, defect: 30}\n  juice: {premium: 6, standard: 3, defect: 1}\n", ""
    )
    with pytest.raises(PolicySchemaError, match="sign is never guessed") as info:
        build(text)
    assert info.value.codes == ["invalid-value"]


@pytest.mark.parametrize("reject", ["{action: hold}", "{action: hold, cost: 1, gain: 1}"])
def test_reject_needs_exactly_one_of_cost_and_gain(reject: str) -> None:
    with pytest.raises(PolicySchemaError, match="exactly one of cost:") as info:
        build(BASE + f"reject: {reject}\n")
    (diagnostic,) = info.value.diagnostics
    assert (diagnostic.code, diagnostic.path, diagnostic.line, diagnostic.col) == ("invalid-value", ("reject",), 11, 9)


def test_negative_revision_is_out_of_range() -> None:
    assert schema_errors(BASE + "revision: -1\n") == [("out-of-range", 11, 11)]


def test_malformed_identifier() -> None:
    assert schema_errors(BASE.replace("policy: grading", "policy: 'grading v2'")) == [("malformed-text", 1, 9)]


def test_name_with_surrounding_space_is_malformed() -> None:
    text = BASE.replace("actions: [pack, juice]", "actions: [pack, ' juice']")
    assert schema_errors(text) == [("malformed-text", 4, 17)]


def test_empty_classes_is_too_short() -> None:
    text = BASE.replace("classes: [premium, standard, defect]", "classes: []")
    assert ("too-short", 2, 10) in schema_errors(text)


def test_priors_neither_mapping_nor_training() -> None:
    codes = {code for code, line, _ in schema_errors(BASE.replace("priors: {premium", "priors: train\nx: {premium"))}
    assert "unknown-choice" in codes


def test_every_error_is_reported_at_once() -> None:
    text = BASE.replace("juice: {premium: 6,", "juice: {premium: '6',") + "invalid_input: drop\nrevison: 2\n"
    assert sorted(schema_errors(text)) == [
        ("expected-number", 7, 20),
        ("unknown-choice", 11, 16),
        ("unknown-key", 12, 1),
    ]


def test_a_mistyped_key_gets_a_did_you_mean_and_the_tables_hint() -> None:
    text = "policy: p\nclasses: [a, b]\nprior: {a: 0.5, b: 0.5}\nactions: [x]\nloss: {x: {a: 0, b: 1}}\n"
    text += "evidence: {kind: log-likelihood, columns: {a: la, b: lb}}\n"
    with pytest.raises(PolicySchemaError) as raised:
        build_policy(parse_source(text, "p.yaml"))
    (unknown,) = [d for d in raised.value.diagnostics if d.code == "unknown-key"]
    assert "did you mean 'priors'?" in unknown.message and unknown.line == 3
    assert unknown.hint == "fix the spelling or remove it"


@pytest.mark.parametrize("quoted", ['"0.5"', "'1e-3'", '"7"'])
def test_a_quoted_number_says_unquote_it(quoted: str) -> None:
    text = f"policy: p\nclasses: [a, b]\npriors: {{a: {quoted}, b: 0.5}}\nactions: [x]\nloss: {{x: {{a: 0, b: 1}}}}\n"
    text += "evidence: {kind: log-likelihood, columns: {a: la, b: lb}}\n"
    with pytest.raises(PolicySchemaError) as raised:
        build_policy(parse_source(text, "p.yaml"))
    (quoted_number,) = [d for d in raised.value.diagnostics if d.path == ("priors", "a")]
    assert quoted_number.code == "expected-number" and "unquote it" in quoted_number.message


@pytest.mark.parametrize("coverage", ["0", "1", "1.5", "-0.1", ".nan"])
def test_novelty_coverage_outside_zero_one_is_an_error(coverage: str) -> None:
    text = BASE + f"reject:\n  action: hold\n  cost: 2.5\n  novelty: {{coverage: {coverage}}}\n"
    codes = [code for code, line, _ in schema_errors(text) if line == 14]
    assert codes in (["out-of-range"], ["not-finite"])


def test_novelty_coverage_inside_zero_one_is_read() -> None:
    policy = build(BASE + "reject: {action: hold, cost: 2.5, novelty: {coverage: 0.999}}\n")
    assert policy.reject is not None and policy.reject.novelty is not None
    assert policy.reject.novelty.coverage == 0.999
