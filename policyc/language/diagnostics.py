"""Located diagnostics and the exception family that carries them.

Every problem policyc finds in a policy is a :class:`Diagnostic`: a stable
kebab-case code, a severity, a message that says what to do, the key path
inside the policy and, once located, the file, line and column.
"""

from __future__ import annotations

import json
from collections.abc import Iterable, Mapping, Sequence
from dataclasses import dataclass, replace
from enum import StrEnum

from policyc.errors import PolicycError
from policyc.language.hints import HINTS

__all__ = [
    "CompileError",
    "Diagnostic",
    "PolicyCheckError",
    "PolicyError",
    "PolicySchemaError",
    "PolicySourceError",
    "Position",
    "Severity",
    "headline",
    "json_path",
    "render_json",
    "render_text",
]

PathPart = str | int
Path = tuple[PathPart, ...]


class Severity(StrEnum):
    ERROR = "error"
    WARNING = "warning"
    INFO = "info"


@dataclass(frozen=True)
class Position:
    """1-based line and column of a node in the source text."""

    line: int
    column: int


@dataclass(frozen=True)
class Diagnostic:
    code: str
    severity: Severity
    message: str
    path: Path = ()
    file: str | None = None
    line: int | None = None
    col: int | None = None
    hint: str | None = None

    def __post_init__(self) -> None:
        if self.hint is None:  # every code carries the README's advice unless the finding has its own
            object.__setattr__(self, "hint", HINTS.get(self.code))

    @property
    def is_error(self) -> bool:
        return self.severity is Severity.ERROR

    def located(
        self, file: str | None, positions: Mapping[Path, Position], key_positions: Mapping[Path, Position]
    ) -> Diagnostic:
        """Fill in file, line and column from the nearest located ancestor of ``path``."""
        position = _nearest_position(self.path, positions, key_positions)
        if position is None:
            return replace(self, file=file)
        return replace(self, file=file, line=position.line, col=position.column)


def _nearest_position(
    path: Path, positions: Mapping[Path, Position], key_positions: Mapping[Path, Position]
) -> Position | None:
    for depth in range(len(path), -1, -1):
        prefix = path[:depth]
        if prefix in positions:
            return positions[prefix]
        if prefix in key_positions:
            return key_positions[prefix]
    return None


def json_path(path: Sequence[PathPart]) -> str:
    """Render a key path JSONPath-style: ``("loss", "juice", 2)`` -> ``$.loss.juice[2]``."""
    rendered = "$"
    for part in path:
        if isinstance(part, int):
            rendered += f"[{part}]"
        elif part.isidentifier():
            rendered += f".{part}"
        else:
            rendered += "[" + json.dumps(part) + "]"
    return rendered


def headline(diagnostics: Iterable[Diagnostic]) -> Diagnostic | None:
    """The most telling diagnostic: errors first, then the shallowest path (like a best match)."""
    ranked = sorted(diagnostics, key=lambda d: (not d.is_error, len(d.path)))
    return ranked[0] if ranked else None


class PolicyError(PolicycError):
    """The language stage's error: a policy that cannot be used, with every located diagnostic.

    Carries the full list of diagnostics; ``str()`` shows the first few, :meth:`as_text` all of them
    with their hints, :meth:`as_json` all of them in their JSON form.
    """

    shown = 5
    stage = "language"

    def __init__(self, diagnostics: Sequence[Diagnostic]) -> None:
        self.diagnostics = tuple(diagnostics)
        super().__init__(self._summary())

    def _summary(self) -> str:
        lines = [_one_line(d) for d in self.diagnostics[: self.shown]]
        hidden = len(self.diagnostics) - self.shown
        if hidden > 0:
            lines.append(f"... and {hidden} more")
        return "\n".join(lines)

    @property
    def codes(self) -> list[str]:
        return [d.code for d in self.diagnostics]

    def as_text(self) -> str:
        return render_text(self.diagnostics)

    def as_json(self) -> dict[str, object]:
        from policyc.language.report import check_report

        return {**super().as_json(), "diagnostics": check_report(self.diagnostics).model_dump(mode="json")}


class PolicySourceError(PolicyError):
    """The YAML text cannot be read strictly."""


class PolicySchemaError(PolicyError):
    """The document does not have the shape of a policy."""


class PolicyCheckError(PolicyError):
    """The policy is well-formed but inconsistent."""


class CompileError(PolicyError):
    """Fitting or compiling the policy failed (data, covariance, ...)."""

    stage = "compiler"


def _location_prefix(diagnostic: Diagnostic) -> str:
    parts = [diagnostic.file or "<policy>"]
    if diagnostic.line is not None:
        parts.append(str(diagnostic.line))
        if diagnostic.col is not None:
            parts.append(str(diagnostic.col))
    return ":".join(parts)


def _one_line(diagnostic: Diagnostic) -> str:
    text = f"{_location_prefix(diagnostic)}: {diagnostic.severity.value}[{diagnostic.code}] {diagnostic.message}"
    if diagnostic.path:
        text += f" (at {json_path(diagnostic.path)})"
    return text


def render_text(
    diagnostics: Iterable[Diagnostic],
    source_lines: Mapping[str, Sequence[str]] | None = None,
    show_source: bool = False,
) -> str:
    """One line per diagnostic; with ``show_source`` the offending line and a caret under the node."""
    out: list[str] = []
    for diagnostic in diagnostics:
        out.append(_one_line(diagnostic))
        if diagnostic.hint:
            out.append(f"    hint: {diagnostic.hint}")
        excerpt = _excerpt(diagnostic, source_lines or {}) if show_source else None
        if excerpt:
            out.extend(excerpt)
    return "\n".join(out)


def _excerpt(diagnostic: Diagnostic, source_lines: Mapping[str, Sequence[str]]) -> list[str] | None:
    lines = source_lines.get(diagnostic.file or "")
    if not lines or diagnostic.line is None or diagnostic.line > len(lines):
        return None
    text = lines[diagnostic.line - 1].rstrip("\n")
    caret = " " * ((diagnostic.col or 1) - 1) + "^"
    return [f"    {text}", f"    {caret}"]


def render_json(diagnostics: Iterable[Diagnostic]) -> str:
    """The stable JSON form: a list of objects with the fields of :class:`Diagnostic`."""
    from policyc.language.report import check_report
    from policyc.render import dumps

    return dumps(check_report(diagnostics))
