"""Strict YAML loading: plain data plus the source position of every key and value.

PyYAML's compose step builds a node tree whose nodes carry start marks; we
construct plain Python values from that tree ourselves, so every typing rule is
ours and stated here (YAML 1.2 core schema, with the YAML 1.1 pitfalls refused):

* mapping keys are always strings, taken from the key's text;
* ``true``/``false`` are booleans; ``yes``/``no``/``on``/``off`` unquoted
  are errors (quote them if they are names);
* ``1e-3``, ``.5``, ``-2`` are numbers; ``~``/``null``/empty are null;
* quoted scalars are always strings;
* sequences become tuples, so the loaded data is immutable in spirit;
* duplicate keys, anchors, aliases, explicit tags, several documents, a
  non-mapping root and files over :data:`MAX_POLICY_BYTES` are errors.
"""

from __future__ import annotations

import hashlib
import re
from dataclasses import dataclass, field
from pathlib import Path as FilePath
from typing import Any

import yaml
from yaml.events import AliasEvent, CollectionStartEvent, ScalarEvent
from yaml.nodes import MappingNode, Node, ScalarNode, SequenceNode

from policyc.language.diagnostics import Diagnostic, Path, PolicySourceError, Position, Severity

__all__ = ["MAX_POLICY_BYTES", "SourceDocument", "load_source", "parse_source"]

MAX_POLICY_BYTES = 1 << 20  # a policy is a reviewed text file, never megabytes

_NULL = re.compile(r"^(?:~|null|Null|NULL|)$")
_BOOL = re.compile(r"^(?:true|True|TRUE|false|False|FALSE)$")
_YAML11_BOOL = re.compile(r"^(?:yes|Yes|YES|no|No|NO|on|On|ON|off|Off|OFF)$")
_INT = re.compile(r"^[-+]?[0-9]+$|^0o[0-7]+$|^0x[0-9a-fA-F]+$")
_FLOAT = re.compile(
    r"^[-+]?(?:\.[0-9]+|[0-9]+(?:\.[0-9]*)?)(?:[eE][-+]?[0-9]+)?$"
    r"|^[-+]?\.(?:inf|Inf|INF)$|^\.(?:nan|NaN|NAN)$"
)


@dataclass(frozen=True)
class SourceDocument:
    """A loaded policy: its text, plain data and where each path sits in the text."""

    name: str
    text: str
    data: dict[str, Any]
    positions: dict[Path, Position] = field(repr=False)
    key_positions: dict[Path, Position] = field(repr=False)
    base_dir: FilePath | None = None

    @property
    def sha256(self) -> str:
        return hashlib.sha256(self.text.encode("utf-8")).hexdigest()

    @property
    def lines(self) -> list[str]:
        return self.text.splitlines()

    def locate(self, diagnostic: Diagnostic, at_key: bool = False) -> Diagnostic:
        """Add file, line and column: of the value at the path, or of its key.

        The key is used with ``at_key``, and when the value starts on a later line than its key
        (a block mapping or list, whose own position is that of its first entry).
        """
        key = self.key_positions.get(diagnostic.path)
        value = self.positions.get(diagnostic.path)
        if key is not None and (at_key or (value is not None and value.line > key.line)):
            return diagnostic.located(self.name, self.key_positions, {})
        return diagnostic.located(self.name, self.positions, self.key_positions)


class _StrictLoader(yaml.SafeLoader):  # type: ignore[misc]  # PyYAML ships no types
    """Refuses anchors, aliases and explicit tags while composing."""

    def compose_node(self, parent: Node | None, index: Any) -> Node | None:
        event = self.peek_event()
        if isinstance(event, AliasEvent):
            raise _Refusal("yaml-alias", "aliases (*name) are not allowed in a policy", event.start_mark)
        if isinstance(event, ScalarEvent | CollectionStartEvent):
            if event.anchor is not None:
                raise _Refusal("yaml-anchor", "anchors (&name) are not allowed in a policy", event.start_mark)
            if event.tag not in (None, "!"):
                raise _Refusal("yaml-tag", f"explicit tag {event.tag!r} is not allowed in a policy", event.start_mark)
        return super().compose_node(parent, index)


class _Refusal(Exception):
    def __init__(self, code: str, message: str, mark: Any, hint: str | None = None) -> None:
        super().__init__(message)
        self.code, self.message, self.mark, self.hint = code, message, mark, hint


def load_source(path: str | FilePath) -> SourceDocument:
    """Read and strictly parse a policy file."""
    file = FilePath(path)
    name = str(path)
    try:
        size = file.stat().st_size
        if size > MAX_POLICY_BYTES:
            raise _source_error(
                name,
                "policy-too-large",
                f"the file is {size} bytes; a policy may have at most {MAX_POLICY_BYTES} bytes",
                None,
            )
        raw = file.read_bytes()
    except OSError as exc:
        raise _source_error(name, "policy-unreadable", f"cannot read the file: {exc.strerror}", None) from exc
    try:
        text = raw.decode("utf-8")
    except UnicodeDecodeError as exc:
        line = raw[: exc.start].count(b"\n") + 1
        raise _source_error(name, "policy-not-utf8", "the file is not UTF-8 text", Position(line, 1)) from exc
    return parse_source(text, name, base_dir=file.resolve().parent)


def parse_source(text: str, name: str = "<policy>", base_dir: FilePath | None = None) -> SourceDocument:
    """Strictly parse policy text; raise :class:`PolicySourceError` with a location on any refusal."""
    if len(text.encode("utf-8")) > MAX_POLICY_BYTES:
        raise _source_error(name, "policy-too-large", f"a policy may have at most {MAX_POLICY_BYTES} bytes", None)
    try:
        root = yaml.compose(text, Loader=_StrictLoader)
    except _Refusal as refusal:
        raise _source_error(name, refusal.code, refusal.message, _position(refusal.mark), refusal.hint) from None
    except yaml.MarkedYAMLError as exc:
        mark = exc.problem_mark or exc.context_mark
        message = " ".join(p for p in (exc.context, exc.problem) if p) or "invalid YAML"
        raise _source_error(name, "yaml-syntax", message, _position(mark)) from None
    if root is None or (isinstance(root, ScalarNode) and root.value == "" and root.style is None):
        raise _source_error(name, "policy-empty", "the file holds no policy", Position(1, 1))
    if not isinstance(root, MappingNode):
        raise _source_error(
            name,
            "policy-not-a-mapping",
            "a policy is a mapping of keys (policy:, classes:, ...)",
            _position(root.start_mark),
        )
    builder = _Builder()
    try:
        data = builder.build(root, ())
    except _Refusal as refusal:
        raise _source_error(name, refusal.code, refusal.message, _position(refusal.mark), refusal.hint) from None
    return SourceDocument(name, text, data, builder.positions, builder.key_positions, base_dir)


class _Builder:
    def __init__(self) -> None:
        self.positions: dict[Path, Position] = {}
        self.key_positions: dict[Path, Position] = {}

    def build(self, node: Node, path: Path) -> Any:
        self.positions[path] = _position(node.start_mark)
        if isinstance(node, MappingNode):
            return self._mapping(node, path)
        if isinstance(node, SequenceNode):
            return tuple(self.build(item, (*path, i)) for i, item in enumerate(node.value))
        assert isinstance(node, ScalarNode)
        return _scalar(node)

    def _mapping(self, node: MappingNode, path: Path) -> dict[str, Any]:
        result: dict[str, Any] = {}
        for key_node, value_node in node.value:
            if not isinstance(key_node, ScalarNode):
                raise _Refusal("yaml-complex-key", "mapping keys must be plain names", key_node.start_mark)
            key = str(key_node.value)
            if key in result:
                first = self.key_positions[(*path, key)]
                raise _Refusal(
                    "duplicate-key",
                    f"key {key!r} appears twice (first at line {first.line})",
                    key_node.start_mark,
                    "remove one of them; a later key would silently win in other YAML readers",
                )
            self.key_positions[(*path, key)] = _position(key_node.start_mark)
            result[key] = self.build(value_node, (*path, key))
        return result


def _scalar(node: ScalarNode) -> Any:
    text = node.value
    if node.style is not None:  # quoted or block scalar: always text
        return text
    if _YAML11_BOOL.match(text):
        raise _Refusal(
            "yaml-ambiguous-boolean",
            f"{text!r} is a boolean in YAML 1.1 but text in YAML 1.2",
            node.start_mark,
            f'write true or false, or quote it ("{text}") if it is a name',
        )
    if _NULL.match(text):
        return None
    if _BOOL.match(text):
        return text.lower() == "true"
    if _INT.match(text):
        return int(text, 0) if text.startswith(("0o", "0x")) else int(text)
    if _FLOAT.match(text):
        return float(text.lower().replace(".inf", "inf").replace(".nan", "nan"))
    return text


def _position(mark: Any) -> Position:
    return Position(mark.line + 1, mark.column + 1)


def _source_error(
    name: str, code: str, message: str, position: Position | None, hint: str | None = None
) -> PolicySourceError:
    diagnostic = Diagnostic(
        code=code,
        severity=Severity.ERROR,
        message=message,
        file=name,
        line=position.line if position else None,
        col=position.column if position else None,
        hint=hint,
    )
    return PolicySourceError([diagnostic])
