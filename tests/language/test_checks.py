"""Consistency rules, one fixture file per rule, plus the demo policies under every rule.

Each ``tests/fixtures/check/<rule>.yaml`` is a YAML list of cases::

    - title: what the case shows
      files: {train.csv: "..."}      # optional: written next to the policy first
      policy: |
        policy: ...
      expect:
        - {code: some-code, line: 3}   # optional severity: error | warning | info

The test runs only that rule on the policy and compares the multiset of
(code, line) with ``expect``; a stated severity must match too.
"""

from __future__ import annotations

import inspect
import re
from collections import Counter
from pathlib import Path
from types import SimpleNamespace
from typing import Any

import pytest
import yaml

from policyc.language import checks as check
from policyc.language.checks import RULES, CheckContext, check_document, check_file, run_rules
from policyc.language.diagnostics import Severity
from policyc.language.model import build_policy
from policyc.language.source import parse_source

ROOT = Path(__file__).resolve().parents[2]
FIXTURES = ROOT / "tests" / "fixtures" / "check"
DEMOS = sorted((ROOT / "policies-demo").glob("*/policy*.yaml"))
RULES_BY_NAME = {rule.__name__: rule for rule in RULES}


def load_cases() -> list[Any]:
    params = []
    for path in sorted(FIXTURES.glob("*.yaml")):
        cases = yaml.safe_load(path.read_text(encoding="utf-8"))
        assert isinstance(cases, list) and cases, f"{path.name} must hold a non-empty list of cases"
        for index, case in enumerate(cases):
            params.append(pytest.param(path.stem, case, id=f"{path.stem}[{index}]"))
    return params


CASES = load_cases()


def write_files(base: Path, files: dict[str, str]) -> None:
    for relative, content in files.items():
        target = base / relative
        target.parent.mkdir(parents=True, exist_ok=True)
        target.write_bytes(content.encode("utf-8"))


@pytest.mark.parametrize(("rule_name", "case"), CASES)
def test_rule_fixture(rule_name: str, case: dict[str, Any], tmp_path: Path) -> None:
    assert set(case) <= {"title", "policy", "expect", "files"}, case.get("title")
    assert case["title"] and isinstance(case["policy"], str)
    rule = RULES_BY_NAME[rule_name]
    write_files(tmp_path, case.get("files") or {})

    report = check_document(parse_source(case["policy"], "policy.yaml", base_dir=tmp_path), rules=(rule,))

    assert report.policy is not None, f"the policy does not build: {report.diagnostics}"
    found = Counter((d.code, d.line) for d in report.diagnostics)
    expected = Counter((e["code"], e["line"]) for e in case["expect"])
    assert found == expected, case["title"]
    for item in case["expect"]:
        if "severity" in item:
            severities = {d.severity for d in report.diagnostics if (d.code, d.line) == (item["code"], item["line"])}
            assert severities == {Severity(item["severity"])}, case["title"]
    assert all(d.file == "policy.yaml" and d.col is not None for d in report.diagnostics)


def test_every_rule_has_a_fixture_file_and_every_file_names_a_rule() -> None:
    files = {path.stem for path in FIXTURES.glob("*.yaml")}
    assert files == set(RULES_BY_NAME)
    assert len(RULES_BY_NAME) == len(RULES) == 28


def test_every_code_the_rules_yield_has_a_fixture_case() -> None:
    source = inspect.getsource(check)
    codes = set(re.findall(r'(?:_error|_warning|Diagnostic)\(\s*"([a-z0-9-]+)"', source))
    assert len(codes) > 20
    covered = {item["code"] for param in CASES for item in param.values[1]["expect"]}
    assert codes <= covered, sorted(codes - covered)


def test_every_rule_has_a_clean_case_and_a_case_that_fires() -> None:
    by_rule: dict[str, list[int]] = {}
    for param in CASES:
        rule_name, case = param.values
        by_rule.setdefault(rule_name, []).append(len(case["expect"]))
    for rule_name, counts in by_rule.items():
        assert 0 in counts, f"{rule_name} has no clean case"
        assert any(counts), f"{rule_name} has no case that fires"


@pytest.mark.parametrize("path", DEMOS, ids=[f"{p.parent.name}/{p.stem}" for p in DEMOS])
def test_demo_policies_pass_every_rule(path: Path) -> None:
    report = check_file(path)
    assert report.policy is not None
    assert not report.has_errors, report.diagnostics
    assert not report.has_warnings, report.diagnostics


def test_there_are_demo_policies() -> None:
    assert len(DEMOS) >= 2


def test_fail_fast_stops_at_the_first_error() -> None:
    text = """\
policy: p
classes: [ok, ok]
priors: {ok: 0.5, bad: 0.6}
actions: [accept, accept]
loss: {accept: {ok: 0}}
evidence: {kind: log-likelihood, columns: {ok: l_ok}}
"""
    document = parse_source(text)
    everything = check_document(document)
    assert len([d for d in everything.diagnostics if d.is_error]) > 1
    first = check_document(document, fail_fast=True)
    assert [d.code for d in first.diagnostics] == ["too-few-classes"]


def test_schema_errors_stop_before_the_rules() -> None:
    report = check_document(parse_source("policy: p\nclasses: [a, b]\n", "p.yaml"))
    assert report.policy is None
    assert report.has_errors
    missing = sorted(d.path for d in report.diagnostics if d.code == "missing-key")
    assert missing == [("actions",), ("evidence",), ("priors",)]


def test_diagnostics_come_in_source_order() -> None:
    text = """\
policy: p
classes: [ok, bad, ok]
priors: {ok: 0.6, bad: 0.6}
actions: [accept, refuse]
loss:
  accept: {ok: 0, bad: 10}
  refuse: {ok: 1, bad: 0}
invalid_input: reject
evidence: {kind: log-likelihood, columns: {ok: l_ok, bad: l_bad}}
"""
    report = check_document(parse_source(text))
    lines = [d.line for d in report.diagnostics]
    assert lines == sorted(lines) == [2, 3, 8]


def test_rules_yield_paths_and_the_driver_adds_positions() -> None:
    text = "policy: p\nclasses: [a, b]\npriors: {a: 0.5, b: 0.6}\nactions: [x]\nloss: {x: {a: 0, b: 0}}\n"
    text += "evidence: {kind: log-likelihood, columns: {a: la, b: lb}}\n"
    policy = build_policy(parse_source(text))
    (raw,) = run_rules(policy, CheckContext(), rules=(RULES_BY_NAME["priors_are_a_distribution"],))
    assert (raw.path, raw.line, raw.file) == (("priors",), None, None)


def test_a_failing_reachability_program_is_a_located_error(monkeypatch: pytest.MonkeyPatch) -> None:
    # Scaling keeps the solver working on every finite matrix we know of; should it still fail, check says so
    # at the matrix instead of ending in a traceback (it used to raise RuntimeError on losses of 1e20).
    from policyc.geometry import reach

    def failing(*args: object, **kwargs: object) -> object:
        return SimpleNamespace(success=False, message="numerical trouble")

    monkeypatch.setattr(reach, "linprog", failing)
    text = (FIXTURES / "every_action_is_reachable.yaml").read_text(encoding="utf-8")
    policy_text = yaml.safe_load(text)[1]["policy"]  # `hedge` wins at no witness posterior: the program must run
    report = check_document(parse_source(policy_text, "p.yaml"))
    (diagnostic,) = [d for d in report.diagnostics if d.code == "loss-not-analysable"]
    assert (diagnostic.file, diagnostic.line, diagnostic.severity) == ("p.yaml", 6, Severity.WARNING)  # the loss: key
    assert "numerical trouble" in diagnostic.message


# --- the numbers quoted in the matrix warnings ----------------------------------------------------------

ZERO_ONE_THREE = """\
policy: p
classes: [a, b, c]
priors: {a: 0.4, b: 0.3, c: 0.3}
actions: [say_a, say_b, say_c]
loss:
  say_a: {a: 0, b: 1, c: 1}
  say_b: {a: 1, b: 0, c: 1}
  say_c: {a: 1, b: 1, c: 0}
reject: {action: defer, cost: COST}
invalid_input: reject
evidence: {kind: log-likelihood, columns: {a: la, b: lb, c: lc}}
"""


def messages(text: str, code: str) -> list[str]:
    report = check_document(parse_source(text, "p.yaml"))
    return [d.message for d in report.diagnostics if d.code == code]


def test_reject_never_taken_quotes_the_value_of_the_whole_matrix() -> None:
    # Chow 1970 / references.md CH-2: under 0-1 loss with K = 3, deferring is taken only below V = (K - 1)/K = 2/3.
    (message,) = messages(ZERO_ONE_THREE.replace("COST", "0.9"), "reject-never-taken")
    assert "the reject cost 0.9 is at least V = 0.666667" in message
    assert messages(ZERO_ONE_THREE.replace("COST", "0.6"), "reject-never-taken") == []


def test_reject_always_taken_names_the_smallest_loss_wherever_it_is() -> None:
    # The smallest risk over the simplex is the smallest loss (a vertex); here it sits in the last action's row.
    text = ZERO_ONE_THREE.replace("0, b: 1, c: 1", "2, b: 3, c: 3").replace("1, b: 0, c: 1", "3, b: 2, c: 3")
    text = text.replace("1, b: 1, c: 0}", "3, b: 3, c: 0.5}")
    (message,) = messages(text.replace("COST", "0.25"), "reject-always-taken")
    assert "the reject cost 0.25 is below every loss (0.5 is the smallest)" in message
    assert messages(text.replace("COST", "0.5"), "reject-always-taken") == []  # equal to a loss: not below it


def test_one_action_policy_has_its_region_everywhere() -> None:
    text = """\
policy: p
classes: [a, b]
priors: {a: 0.5, b: 0.5}
actions: [only]
loss: {only: {a: 1, b: 2}}
invalid_input: error
evidence: {kind: log-likelihood, columns: {a: la, b: lb}}
"""
    report = check_document(parse_source(text, "p.yaml"))
    assert report.policy is not None
    (region,) = check.action_regions(report.policy) or []
    # no rival: the margin is unbounded and the example posterior is the centre of the simplex
    assert region.reachable and region.margin == float("inf") and region.example_posterior == (0.5, 0.5)
    assert not [d for d in report.diagnostics if d.code in ("unreachable-action", "reject-never-taken")]


def test_without_a_base_directory_relative_data_paths_start_at_the_working_directory(
    tmp_path: Path, monkeypatch: pytest.MonkeyPatch
) -> None:
    # a policy given as text (no file, so no folder) reads its data where the program runs, as open() would
    monkeypatch.chdir(tmp_path)
    (tmp_path / "train.csv").write_text("mass_g,grade\n150.0,ok\n120.0,bad\n", encoding="utf-8")
    text = """\
policy: p
classes: [ok, bad]
priors: {ok: 0.9, bad: 0.1}
actions: [accept, refuse]
loss: {accept: {ok: 0, bad: 10}, refuse: {ok: 1, bad: 0}}
evidence: {kind: gaussian, features: [mass_g], training: {data: train.csv, label: grade}}
"""
    report = check_document(parse_source(text, "p.yaml"), rules=(RULES_BY_NAME["training_data_is_present_and_pinned"],))
    assert [d.code for d in report.diagnostics] == ["training-data-unpinned"]
    assert CheckContext().resolve("train.csv") == Path("train.csv")
    assert CheckContext(tmp_path).resolve("/elsewhere/train.csv") == Path("/elsewhere/train.csv")


def test_a_loss_row_named_for_the_reject_action_is_told_where_the_reject_cost_goes() -> None:
    text = """\
policy: p
classes: [ok, bad]
priors: {ok: 0.9, bad: 0.1}
actions: [accept, refuse]
loss:
  accept: {ok: 0, bad: 10}
  refuse: {ok: 1, bad: 0}
  ROW: {ok: 0.5, bad: 0.5}
reject: {action: defer, cost: 0.5}
evidence: {kind: log-likelihood, columns: {ok: l_ok, bad: l_bad}}
"""
    rule = (RULES_BY_NAME["loss_matrix_names_actions_and_classes"],)
    (deferring,) = check_document(parse_source(text.replace("ROW", "defer")), rules=rule).diagnostics
    assert deferring.code == "loss-unknown-action" and "not in the matrix" in (deferring.hint or "")
    (misspelt,) = check_document(parse_source(text.replace("ROW", "acept")), rules=rule).diagnostics
    assert misspelt.code == "loss-unknown-action" and "not in the matrix" not in (misspelt.hint or "")


def test_a_report_shows_the_lines_it_was_checked_on(tmp_path: Path) -> None:
    text = "policy: p\nclasses: [a, b]\n"
    report = check_document(parse_source(text, str(tmp_path / "absent.yaml")))
    assert report.source_lines == ["policy: p", "classes: [a, b]"]  # from the document, not the (absent) file
    unreadable = tmp_path / "bad.yaml"
    unreadable.write_bytes(b"policy: p\nclasses: [a, \xff]\n")  # not UTF-8: no document is built
    report = check_file(unreadable)
    assert report.document is None
    assert report.source_lines == ["policy: p", "classes: [a, \ufffd]"]  # read leniently for the excerpts


# --- the numbers the file rules quote and compare ----------------------------------------------------------

CALIBRATED = """\
policy: p
classes: [ok, bad]
priors: {ok: 0.9, bad: 0.1}
actions: [accept, refuse]
loss: {accept: {ok: 0, bad: 10}, refuse: {ok: 1, bad: 0}}
evidence:
  kind: posterior
  columns: {ok: p_ok, bad: p_bad}
  calibrate: {method: isotonic, data: cal.csv, label: y}
"""


def test_isotonic_calibration_is_advised_against_below_a_thousand_rows_of_a_class_not_at_it(tmp_path: Path) -> None:
    # Niculescu-Mizil & Caruana (ICML 2005), from memory: isotonic maps overfit below about a thousand rows per class
    rows = ["0.9,0.1,ok"] * 1000 + ["0.2,0.8,bad"] * 999
    (tmp_path / "cal.csv").write_text("p_ok,p_bad,y\n" + "\n".join(rows) + "\n", encoding="utf-8")
    document = parse_source(CALIBRATED, "p.yaml", base_dir=tmp_path)
    report = check_document(document, rules=(RULES_BY_NAME["calibration_data_has_enough_rows"],))
    assert [(d.code, "'bad'" in d.message) for d in report.diagnostics] == [("isotonic-few-rows", True)]


def test_a_header_of_many_columns_is_listed_by_its_first_thirty(tmp_path: Path) -> None:
    text = CALIBRATED.replace("method: isotonic", "method: temperature")
    rule = (RULES_BY_NAME["calibration_file_has_the_columns"],)
    for n_columns in (30, 31):
        names = ["p_ok", *(f"c{i}" for i in range(n_columns - 2)), "y"]  # no p_bad
        (tmp_path / "cal.csv").write_text(",".join(names) + "\n", encoding="utf-8")
        report = check_document(parse_source(text, "p.yaml", base_dir=tmp_path), rules=rule)
        (missing,) = report.diagnostics
        listed = ", ".join(map(repr, names[:30])) + (" and 1 more" if n_columns == 31 else "")
        assert missing.code == "calibration-column-missing" and missing.message.endswith(f"its columns are {listed}")


def test_a_missing_data_path_is_quoted_whole_up_to_200_characters_then_by_its_ends() -> None:
    # common practice, no source: a long generated path would drown the message, its two ends tell it apart
    text = CALIBRATED.replace("cal.csv", "PATH")
    rule = (RULES_BY_NAME["calibration_data_is_present_and_pinned"],)
    for length in (200, 201):
        path = "".join(chr(ord("a") + i % 26) for i in range(length - 4)) + ".csv"
        policy = build_policy(parse_source(text.replace("PATH", path)))
        (missing,) = run_rules(policy, CheckContext(), rules=rule)
        shown = path if length == 200 else f"{path[:100]}...{path[-50:]}"
        assert missing.code == "calibration-data-missing" and f"data {shown!r} does not exist" in missing.message


def test_diagnostics_come_in_source_order_whatever_order_the_rules_run_in() -> None:
    # evidence is written first here, while its rule runs after the class and prior rules
    text = """\
policy: p
evidence: {kind: log-likelihood, columns: {ok: l_ok, bad: l_ok}}
priors: {ok: 0.5, bad: 0.6}
classes: [ok, bad]
actions: [accept, refuse]
loss:
  accept: {ok: 0, bad: 10}
  refuse: {ok: 1, bad: 0}
"""
    report = check_document(parse_source(text))
    assert [(d.code, d.line) for d in report.diagnostics if d.is_error] == [
        ("duplicate-column", 2),
        ("duplicate-column", 2),
        ("priors-do-not-sum-to-one", 3),
    ]


def test_a_dominated_action_is_told_which_row_beats_it() -> None:
    # Elkan 2001 §1.1 (references.md EL-4): a row never cheaper than another for any class is never chosen
    text = ZERO_ONE_THREE.replace("say_c: {a: 1, b: 1, c: 0}", "say_c: {a: CA, b: 1, c: CC}")
    (by_deferring,) = messages(text.replace("CA", "1").replace("CC", "0.9").replace("COST", "0.5"), "dominated-action")
    assert "'say_c' is never better than deferring for any class" in by_deferring  # 0.5 ≤ (1, 1, 0.9)
    (by_action,) = messages(text.replace("CA", "1").replace("CC", "1").replace("COST", "0.95"), "dominated-action")
    assert "'say_c' is never better than action 'say_a' for any class" in by_action  # (0, 1, 1) ≤ (1, 1, 1), the first


TWO_BY_TWO = """\
policy: p
classes: [ok, bad]
priors: {ok: 0.5, bad: 0.5}
actions: [accept, refuse]
loss:
  accept: {ok: 0, bad: C01}
  refuse: {ok: C10, bad: 0}
REJECT
evidence: {kind: log-likelihood, columns: {ok: l_ok, bad: l_bad}}
"""


def two_by_two(c01: float, c10: float, cost: float | None = None) -> str:
    reject = "" if cost is None else f"reject: {{action: defer, cost: {cost!r}}}"
    return TWO_BY_TWO.replace("C01", repr(c01)).replace("C10", repr(c10)).replace("REJECT", reject)


def test_losses_up_to_six_orders_of_magnitude_apart_are_analysed_and_no_further() -> None:
    # LOSS_SPREAD_LIMIT = 1e6, common practice, no source: beyond it the tie tolerance swallows the smallest losses
    assert messages(two_by_two(1.0, 1e6), "loss-not-analysable") == []
    (message,) = messages(two_by_two(1.0, 1.5e6), "loss-not-analysable")
    assert "the losses span 1 to 1.5e+06, more than 1e+06 apart" in message


def test_reject_never_taken_quotes_v_even_when_the_cost_ties_it_from_below() -> None:
    # references.md CH-6: V = c01 c10 / (c01 + c10) for a zero-diagonal 2x2. A cost 9e-10 below V is within the tie
    # tolerance (1e-9), so deferring is never taken; the message quotes V itself (0.123457), not the cost (0.123456).
    c = 2 * 0.1234565 + 1e-9  # V = c/2 = 0.1234565 + 5e-10
    value = c * c / (c + c)
    (message,) = messages(two_by_two(c, c, value - 9e-10), "reject-never-taken")
    assert f"is at least V = {value:.6g}," in message and f"{value:.6g}" == "0.123457"


def test_a_transposed_looking_matrix_names_the_cheapest_action_for_the_class() -> None:
    text = """\
policy: p
classes: [a, b, c]
priors: {a: 0.4, b: 0.3, c: 0.3}
actions: [a, b, c]
loss:
  a: {a: 5, b: 0, c: 1}
  b: {a: 0, b: 5, c: 1}
  c: {a: 10, b: 10, c: 0}
evidence: {kind: log-likelihood, columns: {a: la, b: lb, c: lc}}
"""
    # when the truth is a, action b costs 0, the least, and action c 10, the most
    found = messages(text, "loss-may-be-transposed")
    assert found == [
        "when the truth is 'a', action 'a' costs more than 'b'; loss is keyed loss[action][class]",
        "when the truth is 'b', action 'b' costs more than 'a'; loss is keyed loss[action][class]",
    ]


def test_a_note_is_neither_an_error_nor_a_warning_and_rules_collect_every_error_by_default(tmp_path: Path) -> None:
    (tmp_path / "train.csv").write_text("mass_g,grade\n150.0,ok\n120.0,bad\n", encoding="utf-8")
    text = """\
policy: p
classes: [ok, bad]
priors: {ok: 0.9, bad: 0.1}
actions: [accept, refuse]
loss: {accept: {ok: 0, bad: 10}, refuse: {ok: 1, bad: 0}}
evidence: {kind: gaussian, features: [mass_g], training: {data: train.csv, label: grade}}
"""
    noted = check_document(parse_source(text, "p.yaml", base_dir=tmp_path))
    assert [d.severity for d in noted.diagnostics] == [Severity.INFO]  # the data is not pinned
    assert not noted.has_errors and not noted.has_warnings
    warned = check_document(parse_source(text.replace("bad: 0}}", "bad: 20}}"), "p.yaml", base_dir=tmp_path))
    assert warned.has_warnings and not warned.has_errors  # refuse now never beats accept: a warning
    broken = build_policy(parse_source(text.replace("classes: [ok, bad]", "classes: [ok, ok]")))
    assert len([d for d in run_rules(broken, CheckContext(tmp_path)) if d.is_error]) > 1


def test_diagnostics_on_one_line_come_in_column_order_and_a_file_check_collects_them_all(tmp_path: Path) -> None:
    # the prior rule finds the unknown class before the sum, but the sum is reported at the mapping's opening brace
    text = ZERO_ONE_THREE.replace("priors: {a: 0.4, b: 0.3, c: 0.3}", "priors: {a: 0.4, b: 0.3, c: 0.3, zzz: 0.1}")
    path = tmp_path / "p.yaml"
    path.write_text(text.replace("COST", "0.5"), encoding="utf-8")
    report = check_file(path)
    errors = [(d.code, d.line, d.col) for d in report.diagnostics if d.is_error]
    line = text.splitlines()[2]
    brace, unknown = line.index("{") + 1, line.index("zzz: 0.1") + len("zzz: ") + 1  # 1-based columns
    assert errors == [("priors-do-not-sum-to-one", 3, brace), ("prior-unknown-class", 3, unknown)]
