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

Hostile input meets limits before it costs anything: a file is read only if it is
a regular file, and never more than :data:`MAX_POLICY_BYTES` + 1 bytes of it
(``stat`` sizes lie for devices and ``/proc``); control characters, integers
beyond ±2**53, nesting deeper than :data:`MAX_NESTING` and more than
:data:`MAX_NODES` keys, values and items are located errors.
"""

from __future__ import annotations

import hashlib
import os
import re
import stat
from dataclasses import dataclass, field
from pathlib import Path as FilePath
from typing import Any

import yaml
from yaml.composer import Composer
from yaml.events import AliasEvent, CollectionStartEvent, ScalarEvent
from yaml.nodes import MappingNode, Node, ScalarNode, SequenceNode
from yaml.parser import Parser
from yaml.reader import Reader
from yaml.resolver import Resolver
from yaml.scanner import Scanner

from policyc.language.diagnostics import Diagnostic, Path, PolicySourceError, Position, Severity

__all__ = [
    "MAX_INTEGER",
    "MAX_NESTING",
    "MAX_NODES",
    "MAX_POLICY_BYTES",
    "SourceDocument",
    "load_source",
    "parse_source",
    "parse_source_bytes",
]

MAX_POLICY_BYTES = 1 << 20  # a policy is a reviewed text file, never megabytes
MAX_NESTING = 32  # a policy nests four or five levels; the limit keeps composing far from Python's recursion limit
MAX_NODES = 20_000  # keys, values and list items: a 100-class, 100-action loss matrix fits; parsing stays ~0.2 s
MAX_INTEGER = 1 << 53  # every integer up to 2**53 is exact as a float, so a number never changes silently

# What YAML allows in a stream (YAML 1.1 §5.1, as PyYAML's reader checks it), less the characters that are
# invisible in review yet change what a reader sees: NEL and the Unicode line and paragraph separators (line
# breaks to YAML 1.1 and libyaml, not to editors, so positions would disagree) and the bidirectional embedding,
# override and isolate controls (they reorder text on screen, CVE-2021-42574). Anything else is refused by us,
# with a position, before the parser sees it.
_NOT_PRINTABLE = re.compile(
    "[^\x09\x0a\x0d\x20-\x7e\xa0-\u2027\u202f-\u2065\u206a-\ud7ff\ue000-\ufffd\U00010000-\U0010ffff]"
)


class _PythonEventParser(Reader, Scanner, Parser):  # type: ignore[misc]  # PyYAML ships no types
    """PyYAML's pure-Python events, for an installation without libyaml."""

    def __init__(self, stream: str) -> None:
        Reader.__init__(self, stream)
        Scanner.__init__(self)
        Parser.__init__(self)


try:
    from yaml._yaml import CParser as _FastEventParser
except ImportError:  # PyYAML built without libyaml
    _FastEventParser = _PythonEventParser

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


class _StrictComposer(Composer, Resolver):  # type: ignore[misc]  # PyYAML ships no types
    """Refuses anchors, aliases, explicit tags, deep nesting and too many nodes while composing.

    Mixed with an event parser below: libyaml's where PyYAML was built with it (about ten times faster),
    the pure-Python one otherwise; the tests run both.
    """

    def __init__(self) -> None:
        Composer.__init__(self)
        Resolver.__init__(self)
        self._depth = 0
        self._nodes = 0

    def compose_node(self, parent: Node | None, index: Any) -> Node | None:
        event = self.peek_event()
        self._count(event)
        self._depth += 1
        try:
            return self._compose_checked(parent, index, event)
        finally:
            self._depth -= 1

    def _count(self, event: Any) -> None:
        self._nodes += 1
        if self._nodes > MAX_NODES:
            raise _Refusal(
                "too-many-nodes",
                f"the policy has more than {MAX_NODES} keys, values and list items",
                event.start_mark,
                "a policy is a short reviewed text; split it, or check that it is the file you meant",
            )
        if self._depth >= MAX_NESTING:
            raise _Refusal("nesting-too-deep", _TOO_DEEP, event.start_mark, _TOO_DEEP_HINT)

    def _compose_checked(self, parent: Node | None, index: Any, event: Any) -> Node | None:
        if isinstance(event, AliasEvent):
            raise _Refusal("yaml-alias", "aliases (*name) are not allowed in a policy", event.start_mark)
        if isinstance(event, ScalarEvent | CollectionStartEvent):
            if event.anchor is not None:
                raise _Refusal("yaml-anchor", "anchors (&name) are not allowed in a policy", event.start_mark)
            if event.tag not in (None, "!"):
                raise _Refusal("yaml-tag", f"explicit tag {event.tag!r} is not allowed in a policy", event.start_mark)
        return super().compose_node(parent, index)


def _strict_loader(event_parser: Any) -> type:
    def __init__(self: Any, stream: str) -> None:
        event_parser.__init__(self, stream)
        _StrictComposer.__init__(self)

    return type("_StrictLoader", (_StrictComposer, event_parser), {"__init__": __init__})


_StrictLoader = _strict_loader(_FastEventParser)


_TOO_DEEP = f"the policy nests deeper than {MAX_NESTING} levels"
_TOO_DEEP_HINT = "a policy nests a few levels (loss: action: class: value); check the brackets"


def _too_deep(name: str, mark: Any) -> PolicySourceError:
    return _source_error(name, "nesting-too-deep", _TOO_DEEP, _position(mark) if mark else None, _TOO_DEEP_HINT)


class _Refusal(Exception):
    def __init__(self, code: str, message: str, mark: Any, hint: str | None = None) -> None:
        super().__init__(message)
        self.code, self.message, self.mark, self.hint = code, message, mark, hint


def load_source(path: str | FilePath) -> SourceDocument:
    """Read and strictly parse a policy file."""
    file = FilePath(path)
    name = str(path)
    return parse_source_bytes(_read_capped(file, name), name, base_dir=file.resolve().parent)


def parse_source_bytes(raw: bytes, name: str = "<policy>", base_dir: FilePath | None = None) -> SourceDocument:
    """Decode policy bytes as UTF-8 and strictly parse them, as :func:`load_source` does with a file's bytes."""
    if len(raw) > MAX_POLICY_BYTES:
        raise _too_large(name, raw)
    try:
        text = raw.decode("utf-8")
    except UnicodeDecodeError as exc:
        line = raw[: exc.start].count(b"\n") + 1
        raise _source_error(name, "policy-not-utf8", "the file is not UTF-8 text", Position(line, 1)) from None
    return parse_source(text, name, base_dir)


def _read_capped(file: FilePath, name: str) -> bytes:
    """At most MAX_POLICY_BYTES + 1 bytes of a regular file; anything else is refused before it is read.

    Opening without blocking keeps a FIFO with no writer from hanging us; reading in bounded chunks
    keeps a device (/dev/zero) or a file that grows from filling memory whatever ``stat`` says.
    """
    try:
        descriptor = os.open(file, os.O_RDONLY | getattr(os, "O_NONBLOCK", 0) | getattr(os, "O_CLOEXEC", 0))
    except OSError as exc:
        raise _source_error(name, "policy-unreadable", f"cannot read the file: {exc.strerror}", None) from None
    try:
        mode = os.fstat(descriptor).st_mode
        if not stat.S_ISREG(mode):
            raise _source_error(
                name,
                "policy-not-a-file",
                f"this is {_file_kind(mode)}, not a regular file; a policy is read from a file",
                None,
            )
        chunks: list[bytes] = []
        size = 0
        while size <= MAX_POLICY_BYTES:
            chunk = os.read(descriptor, MAX_POLICY_BYTES + 1 - size)
            if not chunk:
                break
            chunks.append(chunk)
            size += len(chunk)
        return b"".join(chunks)
    except OSError as exc:
        raise _source_error(name, "policy-unreadable", f"cannot read the file: {exc.strerror}", None) from None
    finally:
        os.close(descriptor)


def _file_kind(mode: int) -> str:
    kinds = [
        (stat.S_ISDIR, "a directory"),
        (stat.S_ISFIFO, "a FIFO (named pipe)"),
        (stat.S_ISCHR, "a character device"),
        (stat.S_ISBLK, "a block device"),
        (stat.S_ISSOCK, "a socket"),
    ]
    return next((kind for test, kind in kinds if test(mode)), "not a regular file")


def _too_large(name: str, raw: bytes) -> PolicySourceError:
    """The refusal of an oversized policy, located at the first byte beyond the cap."""
    head = raw[:MAX_POLICY_BYTES]
    line_start = head.rfind(b"\n") + 1
    position = Position(head.count(b"\n") + 1, len(head) - line_start + 1)
    return _source_error(
        name, "policy-too-large", f"a policy may have at most {MAX_POLICY_BYTES} bytes; this one has more", position
    )


def parse_source(text: str, name: str = "<policy>", base_dir: FilePath | None = None) -> SourceDocument:
    """Strictly parse policy text; raise :class:`PolicySourceError` with a location on any refusal."""
    encoded = text.encode("utf-8", errors="surrogatepass")
    if len(encoded) > MAX_POLICY_BYTES:
        raise _too_large(name, encoded)
    _refuse_control_characters(text, name)
    try:
        root = yaml.compose(text, Loader=_StrictLoader)
    except _Refusal as refusal:
        raise _source_error(name, refusal.code, refusal.message, _position(refusal.mark), refusal.hint) from None
    except yaml.MarkedYAMLError as exc:
        mark = exc.problem_mark or exc.context_mark
        message = " ".join(p for p in (exc.context, exc.problem) if p) or "invalid YAML"
        if "nesting depth" in message:  # libyaml stops at 1,000 levels while scanning ahead of our composer
            raise _too_deep(name, mark) from None
        raise _source_error(name, "yaml-syntax", message, _position(mark) if mark else None) from None
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
    if node.style:  # quoted or block scalar: always text (plain is None, or '' from libyaml)
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
        return _integer(text, node)
    if _FLOAT.match(text):
        return float(text.lower().replace(".inf", "inf").replace(".nan", "nan"))
    return text


def _integer(text: str, node: ScalarNode) -> int:
    """The integer a plain scalar spells, refused beyond ±MAX_INTEGER (checked on the digits before converting)."""
    digits = text.lstrip("+-")
    value = None
    if len(digits) <= 24:  # any longer is too large in every base; int() would also refuse 4,300 decimal digits
        value = int(text, 0) if digits.startswith(("0o", "0x")) else int(text)
    if value is None or abs(value) > MAX_INTEGER:
        raise _Refusal(
            "number-too-large",
            f"the integer {_abbreviated(text)} lies beyond ±2**53, where integers stop being exact as numbers",
            node.start_mark,
            "write it as a decimal number with an exponent (1e20) if you mean it, or quote it if it is a name",
        )
    return value


def _abbreviated(text: str) -> str:
    return text if len(text) <= 24 else f"{text[:10]}...{text[-6:]} ({len(text)} characters)"


def _refuse_control_characters(text: str, name: str) -> None:
    """Refuse characters that YAML forbids (control characters, surrogates) at their line and column."""
    found = _NOT_PRINTABLE.search(text)
    if found is None:
        return
    line = text.count("\n", 0, found.start()) + 1
    column = found.start() - (text.rfind("\n", 0, found.start()) + 1) + 1
    raise _source_error(
        name,
        "control-character",
        f"the character U+{ord(found.group()):04X} is not allowed in a policy",
        Position(line, column),
        "delete it: control characters are invisible in review; write tabs and line breaks as themselves",
    )


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
