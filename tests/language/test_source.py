"""Strict YAML loading: every refusal has its code and position; accepted scalars have YAML 1.2 types."""

from __future__ import annotations

import math
import os
import threading
from pathlib import Path

import pytest

from policyc.language import source
from policyc.language.diagnostics import Diagnostic, PolicySourceError, Position, Severity
from policyc.language.source import (
    MAX_INTEGER,
    MAX_NESTING,
    MAX_NODES,
    MAX_POLICY_BYTES,
    SourceDocument,
    load_source,
    parse_source,
)


@pytest.fixture(autouse=True, params=["libyaml", "python"])
def event_parser(request: pytest.FixtureRequest, monkeypatch: pytest.MonkeyPatch) -> None:
    """Every test runs with libyaml's events (where PyYAML has them) and with the pure-Python ones."""
    if request.param == "python":
        monkeypatch.setattr(source, "_StrictLoader", source._strict_loader(source._PythonEventParser))
    elif source._FastEventParser is source._PythonEventParser:
        pytest.skip("PyYAML was built without libyaml")


def refusal(text: str, name: str = "p.yaml") -> Diagnostic:
    """The single diagnostic that strict parsing of ``text`` raises."""
    with pytest.raises(PolicySourceError) as info:
        parse_source(text, name)
    (diagnostic,) = info.value.diagnostics
    assert diagnostic.severity is Severity.ERROR
    assert diagnostic.file == name
    return diagnostic


def where(diagnostic: Diagnostic) -> tuple[str, int | None, int | None]:
    return diagnostic.code, diagnostic.line, diagnostic.col


# --- refusals ----------------------------------------------------------------------------------


def test_duplicate_key_at_top_level_points_at_the_second_key() -> None:
    diagnostic = refusal("a: 1\nb: 2\n\na: 3\n")
    assert where(diagnostic) == ("duplicate-key", 4, 1)
    assert "first at line 1" in diagnostic.message
    assert diagnostic.hint is not None


def test_duplicate_key_in_a_nested_mapping_points_at_the_second_key() -> None:
    text = "loss:\n  juice: {premium: 6, standard: 3, premium: 1}\n"
    assert where(refusal(text)) == ("duplicate-key", 2, 36)


def test_duplicate_key_message_names_the_key() -> None:
    diagnostic = refusal("evidence:\n  kind: gaussian\n  kind: posterior\n")
    assert where(diagnostic) == ("duplicate-key", 3, 3)
    assert "'kind'" in diagnostic.message
    assert "first at line 2" in diagnostic.message


@pytest.mark.parametrize("word", ["yes", "no", "on", "off", "Yes", "NO", "On", "OFF"])
def test_yaml11_booleans_unquoted_are_refused(word: str) -> None:
    diagnostic = refusal(f"renormalise: {word}\n")
    assert where(diagnostic) == ("yaml-ambiguous-boolean", 1, 14)
    assert diagnostic.hint is not None and word in diagnostic.hint


def test_yaml11_boolean_inside_a_flow_sequence_is_located() -> None:
    assert where(refusal("actions: [pack, no]\n")) == ("yaml-ambiguous-boolean", 1, 17)


@pytest.mark.parametrize("word", ["yes", "no", "on", "off"])
def test_yaml11_booleans_quoted_are_names(word: str) -> None:
    document = parse_source(f"single: '{word}'\ndouble: \"{word}\"\nlist: ['{word}']\n")
    assert document.data == {"single": word, "double": word, "list": (word,)}


def test_yaml11_boolean_as_a_key_is_a_name() -> None:
    # Keys are always text, so a key spelled `no` is the name "no", never False.
    assert parse_source("no: 1\n").data == {"no": 1}


def test_anchor_is_refused() -> None:
    assert where(refusal("costs: &row {a: 1}\n")) == ("yaml-anchor", 1, 8)


def test_alias_is_refused() -> None:
    # The anchor is refused first when both are present, so the alias is tested on its own.
    assert where(refusal("a: 1\nb: *row\n")) == ("yaml-alias", 2, 4)


def test_anchor_on_a_scalar_is_refused_before_its_alias() -> None:
    assert where(refusal("a: &x 1\nb: *x\n")) == ("yaml-anchor", 1, 4)


@pytest.mark.parametrize(
    ("text", "col"),
    [("cost: !!float 1\n", 7), ("cost: !!str 1\n", 7), ("evidence: !custom {kind: gaussian}\n", 11)],
)
def test_explicit_tags_are_refused(text: str, col: int) -> None:
    diagnostic = refusal(text)
    assert where(diagnostic) == ("yaml-tag", 1, col)
    assert "tag" in diagnostic.message


def test_complex_key_is_refused() -> None:
    assert refusal("? [a, b]\n: 1\n").code == "yaml-complex-key"


def test_nesting_beyond_the_limit_is_refused_where_it_starts() -> None:
    text = "policy: " + "[" * 999 + "]" * 999 + "\n"
    # the root mapping is level 1 and the first bracket level 2, so bracket number MAX_NESTING is one too deep
    assert where(refusal(text)) == ("nesting-too-deep", 1, 9 + MAX_NESTING - 1)


@pytest.mark.parametrize("opening", ["[", "{a: "])
def test_thousands_of_levels_are_refused_as_too_deep(opening: str) -> None:
    # ~1,000 levels of brackets ended in RecursionError; libyaml's scanner stops at 1,000 levels on its own.
    closing = "]" if opening == "[" else "}"
    diagnostic = refusal("policy: " + opening * 3000 + "1" + closing * 3000 + "\n")
    assert diagnostic.code == "nesting-too-deep" and diagnostic.line == 1


def test_nesting_at_the_limit_is_read() -> None:
    levels = MAX_NESTING - 2  # the root mapping and the innermost scalar are levels too
    document = parse_source("policy: " + "[" * levels + "1" + "]" * levels + "\n")
    value = document.data["policy"]
    for _ in range(levels):
        (value,) = value
    assert value == 1


def test_too_many_nodes_are_refused_at_the_first_beyond_the_limit() -> None:
    text = "policy: p\nitems: [" + ", ".join(["1"] * MAX_NODES) + "]\n"
    # nodes so far: the root, two keys, 'p', the list; so the list item number MAX_NODES - 4 is one too many
    assert where(refusal(text)) == ("too-many-nodes", 2, 9 + 3 * (MAX_NODES - 5))


def test_fifty_thousand_keys_are_refused_quickly() -> None:
    # 50,000 keys took 6.5 s to parse and check; the node limit stops it after MAX_NODES nodes.
    text = "policy: p\nextra:\n" + "".join(f"  k{i}: {i}\n" for i in range(50_000))
    assert refusal(text).code == "too-many-nodes"


@pytest.mark.parametrize(
    "character",
    [
        "\x00",
        "\x01",
        "\x08",
        "\x1b",
        "\x7f",
        "\x85",
        "\x9b",
        "\u2028",
        "\u2029",
        "\u202e",
        "\u2067",
        "\ufffe",
        "\ud800",
    ],
)
def test_control_characters_are_refused_where_they_stand(character: str) -> None:
    # These ended in PyYAML's unlocated ReaderError.
    diagnostic = refusal(f"policy: p\ndescription: a{character}b\n")
    assert where(diagnostic) == ("control-character", 2, 15)
    assert f"U+{ord(character):04X}" in diagnostic.message


def test_tabs_line_breaks_and_printable_unicode_are_text() -> None:
    document = parse_source('policy: p\r\ndescription: "caf\u00e9\\t\u4e2d \U0001f34e"\n')
    assert document.data["description"] == "caf\u00e9\t\u4e2d \U0001f34e"
    # right-to-left names need no bidirectional controls, so refusing those costs them nothing
    assert parse_source("policy: p\ndescription: \u0645\u0631\u062d\u0628\u0627\n").data["description"] == (
        "\u0645\u0631\u062d\u0628\u0627"
    )


@pytest.mark.parametrize(
    ("scalar", "col"),
    [("9" * 5000, 11), (str(MAX_INTEGER + 1), 11), ("-" + str(MAX_INTEGER + 1), 11), ("0x" + "f" * 14, 11)],
)
def test_integers_beyond_two_to_the_53_are_refused(scalar: str, col: int) -> None:
    # A 5,000-digit integer ended in Python's ValueError on converting it.
    diagnostic = refusal(f"policy: p\nrevision: {scalar}\n")
    assert where(diagnostic) == ("number-too-large", 2, col)
    assert len(diagnostic.message) < 200


@pytest.mark.parametrize("scalar", [str(MAX_INTEGER), "-" + str(MAX_INTEGER), "0x" + "f" * 13, "1" + "0" * 400 + ".0"])
def test_integers_up_to_two_to_the_53_and_long_floats_are_numbers(scalar: str) -> None:
    value = parse_source(f"policy: p\nrevision: {scalar}\n").data["revision"]
    assert value == (int(scalar, 0) if "." not in scalar else math.inf)


def test_text_over_the_size_limit_is_refused_at_the_first_byte_beyond() -> None:
    text = "# " + "x" * MAX_POLICY_BYTES + "\npolicy: p\n"
    assert where(refusal(text)) == ("policy-too-large", 1, MAX_POLICY_BYTES + 1)


def test_file_over_the_size_limit_is_refused(tmp_path: Path) -> None:
    path = tmp_path / "big.yaml"
    path.write_bytes(b"policy: p\n" + b"#" * MAX_POLICY_BYTES + b"\n")
    with pytest.raises(PolicySourceError) as info:
        load_source(path)
    assert info.value.codes == ["policy-too-large"]
    assert str(MAX_POLICY_BYTES) in info.value.diagnostics[0].message


def test_endless_device_is_refused_without_reading_it() -> None:
    # /dev/zero reports size 0 and never ends: trusting stat read it until memory ran out.
    with pytest.raises(PolicySourceError) as info:
        load_source("/dev/zero")
    assert info.value.codes == ["policy-not-a-file"]
    assert "character device" in info.value.diagnostics[0].message


def test_directory_is_not_a_policy_file(tmp_path: Path) -> None:
    with pytest.raises(PolicySourceError) as info:
        load_source(tmp_path)
    assert info.value.codes == ["policy-not-a-file"]


@pytest.mark.skipif(not hasattr(os, "mkfifo"), reason="named pipes are a POSIX feature")
def test_fifo_is_refused_without_waiting_for_a_writer(tmp_path: Path) -> None:
    fifo = tmp_path / "policy.yaml"
    os.mkfifo(fifo)
    outcome: list[object] = []

    def load() -> None:
        try:
            load_source(fifo)
        except PolicySourceError as exc:
            outcome.append(exc.codes)

    reader = threading.Thread(target=load, daemon=True)
    reader.start()
    reader.join(timeout=10.0)
    if reader.is_alive():  # release the blocked reader so the test run can end
        os.close(os.open(fifo, os.O_WRONLY | os.O_NONBLOCK))
        pytest.fail("load_source waited on a FIFO instead of refusing it")
    assert outcome == [["policy-not-a-file"]]


def test_file_at_the_size_limit_is_read(tmp_path: Path) -> None:
    head = b"policy: p\n"
    path = tmp_path / "full.yaml"
    path.write_bytes(head + b"#" * (MAX_POLICY_BYTES - len(head) - 1) + b"\n")
    assert path.stat().st_size == MAX_POLICY_BYTES
    assert load_source(path).data == {"policy": "p"}


@pytest.mark.parametrize(
    ("text", "line", "col"),
    [("- a\n- b\n", 1, 1), ("just text\n", 1, 1), ("# a comment\n\n42\n", 3, 1)],
)
def test_root_must_be_a_mapping(text: str, line: int, col: int) -> None:
    assert where(refusal(text)) == ("policy-not-a-mapping", line, col)


@pytest.mark.parametrize("text", ["", "\n\n", "# only a comment\n"])
def test_empty_document_is_refused(text: str) -> None:
    assert where(refusal(text)) == ("policy-empty", 1, 1)


def test_several_documents_are_refused_at_the_second() -> None:
    diagnostic = refusal("policy: a\n---\npolicy: b\n")
    assert where(diagnostic) == ("yaml-syntax", 2, 1)
    assert "single document" in diagnostic.message


@pytest.mark.parametrize(
    ("text", "line"),
    [
        ("classes: [a, b\npriors: {}\n", 2),  # unclosed flow sequence
        ("policy: p\n  revision: 3\n", 2),  # bad indentation
        ("policy: p\nloss:\n\t- 1\n", 3),  # tab indentation
        ("policy: 'p\n", 2),  # unterminated quote
    ],
)
def test_syntax_errors_carry_a_line(text: str, line: int) -> None:
    diagnostic = refusal(text)
    assert diagnostic.code == "yaml-syntax"
    assert diagnostic.line == line
    assert diagnostic.col is not None and diagnostic.col >= 1
    assert diagnostic.message


def test_non_utf8_file_is_refused_at_the_line_of_the_bad_byte(tmp_path: Path) -> None:
    path = tmp_path / "latin1.yaml"
    path.write_bytes("policy: p\nclasses: [a, b]\ndescription: caf\xe9\n".encode("latin-1"))
    with pytest.raises(PolicySourceError) as info:
        load_source(path)
    (diagnostic,) = info.value.diagnostics
    assert (diagnostic.code, diagnostic.line, diagnostic.col) == ("policy-not-utf8", 3, 1)
    assert diagnostic.file == str(path)


def test_missing_file_is_unreadable(tmp_path: Path) -> None:
    with pytest.raises(PolicySourceError) as info:
        load_source(tmp_path / "absent.yaml")
    assert info.value.codes == ["policy-unreadable"]


# --- accepted scalars ----------------------------------------------------------------------------


@pytest.mark.parametrize(
    ("scalar", "expected"),
    [
        ("1e-3", 0.001),
        ("1E3", 1000.0),
        ("2.5e+2", 250.0),
        (".5", 0.5),
        ("-.5", -0.5),
        ("1.", 1.0),
        ("-2", -2),
        ("+3", 3),
        ("0", 0),
        ("010", 10),  # YAML 1.2: decimal, not octal
        ("0x1f", 31),
        ("0o17", 15),
        ("2.50", 2.5),
    ],
)
def test_numbers(scalar: str, expected: float) -> None:
    value = parse_source(f"v: {scalar}\n").data["v"]
    assert value == expected
    assert type(value) is type(expected)


def test_1e_minus_3_is_a_float_not_text() -> None:
    value = parse_source("cost: 1e-3\n").data["cost"]
    assert isinstance(value, float) and value == pytest.approx(1e-3, rel=0, abs=0)


@pytest.mark.parametrize(("scalar", "sign"), [(".inf", 1), ("+.inf", 1), ("-.inf", -1), (".Inf", 1), ("-.INF", -1)])
def test_infinities(scalar: str, sign: int) -> None:
    value = parse_source(f"v: {scalar}\n").data["v"]
    assert math.isinf(value) and math.copysign(1.0, value) == sign


@pytest.mark.parametrize("scalar", [".nan", ".NaN", ".NAN"])
def test_not_a_number(scalar: str) -> None:
    assert math.isnan(parse_source(f"v: {scalar}\n").data["v"])


@pytest.mark.parametrize("scalar", ["~", "null", "Null", "NULL", ""])
def test_nulls(scalar: str) -> None:
    assert parse_source(f"v: {scalar}\n").data == {"v": None}


@pytest.mark.parametrize(("scalar", "expected"), [("true", True), ("True", True), ("false", False), ("FALSE", False)])
def test_booleans(scalar: str, expected: bool) -> None:
    assert parse_source(f"v: {scalar}\n").data["v"] is expected


@pytest.mark.parametrize(
    "scalar", ["'1e-3'", '"2"', "'true'", "'null'", '"~"', "'.inf'", "'0x1f'", "|\n  3\n", ">\n  4\n"]
)
def test_quoted_and_block_scalars_stay_text(scalar: str) -> None:
    value = parse_source(f"v: {scalar}\n").data["v"]
    assert isinstance(value, str)


@pytest.mark.parametrize("scalar", ["premium", "1_000", "0X1F", "1.2.3", "pack premium", "-0x1f"])
def test_other_plain_scalars_are_text(scalar: str) -> None:
    assert parse_source(f"v: {scalar}\n").data["v"] == scalar


def test_keys_are_text_even_when_they_look_like_numbers_or_booleans() -> None:
    data = parse_source("0: a\n1.5: b\ntrue: c\nnull: d\n").data
    assert data == {"0": "a", "1.5": "b", "true": "c", "null": "d"}
    assert all(isinstance(key, str) for key in data)


def test_sequences_become_tuples_at_every_depth() -> None:
    data = parse_source("classes: [a, b]\nnested:\n  - [1, 2]\n  - {x: [3]}\n").data
    assert data["classes"] == ("a", "b")
    assert isinstance(data["classes"], tuple)
    assert data["nested"] == ((1, 2), {"x": (3,)})
    assert isinstance(data["nested"][0], tuple) and isinstance(data["nested"][1]["x"], tuple)


# --- positions -----------------------------------------------------------------------------------

POLICY = """\
# a comment line
policy: demo
classes: [premium, defect]
loss:
  pack:  {premium: 0, defect: 30}
  juice:
    premium: 6
    defect: 1
"""


@pytest.fixture
def document() -> SourceDocument:
    return parse_source(POLICY, "demo.yaml")


def test_value_positions_are_one_based(document: SourceDocument) -> None:
    assert document.positions[()] == Position(2, 1)
    assert document.positions[("policy",)] == Position(2, 9)
    assert document.positions[("classes",)] == Position(3, 10)
    assert document.positions[("classes", 0)] == Position(3, 11)
    assert document.positions[("classes", 1)] == Position(3, 20)
    assert document.positions[("loss", "pack", "defect")] == Position(5, 31)
    assert document.positions[("loss", "juice", "defect")] == Position(8, 13)


def test_key_positions_point_at_the_keys(document: SourceDocument) -> None:
    assert document.key_positions[("policy",)] == Position(2, 1)
    assert document.key_positions[("loss",)] == Position(4, 1)
    assert document.key_positions[("loss", "pack")] == Position(5, 3)
    assert document.key_positions[("loss", "pack", "defect")] == Position(5, 23)
    assert document.key_positions[("loss", "juice")] == Position(6, 3)
    assert document.key_positions[("loss", "juice", "premium")] == Position(7, 5)
    # Sequence items have values but no keys.
    assert ("classes", 0) not in document.key_positions


def test_positions_point_at_the_text_they_name(document: SourceDocument) -> None:
    lines = document.lines
    for path, position in document.key_positions.items():
        key = str(path[-1])
        assert lines[position.line - 1][position.column - 1 :].startswith(key), path


def test_document_keeps_name_text_and_hash(document: SourceDocument) -> None:
    assert document.name == "demo.yaml"
    assert document.text == POLICY
    assert len(document.sha256) == 64
    assert document.sha256 == parse_source(POLICY).sha256
    assert document.sha256 != parse_source(POLICY + "# changed\n").sha256


def test_locate_uses_the_value_or_the_key(document: SourceDocument) -> None:
    diagnostic = Diagnostic("x", Severity.ERROR, "m", ("loss", "juice"))
    # a block mapping starts below its key, so the key's line is the one to show
    located = document.locate(diagnostic)
    assert (located.file, located.line, located.col) == ("demo.yaml", 6, 3)
    assert document.locate(diagnostic, at_key=True) == located
    flow = Diagnostic("x", Severity.ERROR, "m", ("loss", "pack"))
    assert document.locate(flow).col != document.locate(flow, at_key=True).col  # flow value: the value itself


def test_locate_falls_back_to_the_nearest_ancestor(document: SourceDocument) -> None:
    diagnostic = Diagnostic("x", Severity.ERROR, "m", ("loss", "pack", "standard"))
    located = document.locate(diagnostic)
    assert (located.line, located.col) == (5, 10)


def test_load_source_sets_the_base_dir(tmp_path: Path) -> None:
    path = tmp_path / "policy.yaml"
    path.write_text(POLICY, encoding="utf-8")
    document = load_source(path)
    assert document.base_dir == tmp_path.resolve()
    assert document.name == str(path)
    assert document.data["classes"] == ("premium", "defect")
