"""The package tree is the architecture: each stage imports only the stages before it, and review tools are siblings.

The import graph is read from the sources (absolute and relative imports, ``TYPE_CHECKING`` blocks and imports
inside functions included), so a reach backwards fails here before it confuses a reader.
"""

from __future__ import annotations

import ast
from collections.abc import Iterator
from pathlib import Path

import pytest

PACKAGE = Path(__file__).resolve().parents[1] / "policyc"

# What each part of the package may import from the rest of policyc (besides itself).
ALLOWED: dict[str, set[str]] = {
    "runtime": set(),
    "geometry": set(),
    "files": {"errors"},
    "render": set(),
    "errors": {"runtime"},
    "language": {"files", "geometry", "errors", "render"},
    "evidence": {"language", "files", "errors"},
    "compiler": {"language", "evidence", "runtime", "files", "render", "errors", "policyc"},
    "batch": {"evidence", "runtime", "errors"},
    "partitioned": {"batch", "evidence", "runtime", "files", "errors"},
    "cluster": {"evidence", "runtime", "errors"},
    "schemas": {"language", "compiler", "review.diff", "review.evaluate", "review.inspect", "review.priors"},
    "review.shared": {"language", "evidence", "compiler", "runtime", "errors"},
    "review.reports": {"errors"},
}
REVIEW_SIBLING_ALLOWED = {"geometry", "evidence", "runtime", "batch", "render", "files", "errors", "review.shared"}
REVIEW_TOOLS = ("diff", "evaluate", "priors", "plot", "inspect")


def part_of(module: str) -> str | None:
    """The architectural part a policyc module belongs to (``review.<tool>`` for the review tools)."""
    parts = module.split(".")
    if parts[0] != "policyc":
        return None
    if len(parts) == 1:
        return "policyc"
    if parts[1] == "review" and len(parts) > 2:
        return f"review.{parts[2]}"
    return parts[1]


def module_name(path: Path) -> str:
    relative = path.relative_to(PACKAGE.parent).with_suffix("")
    parts = relative.parts[:-1] if relative.name == "__init__" else relative.parts
    return ".".join(parts)


def imported_modules(path: Path) -> Iterator[tuple[str, int]]:
    """Every module a file imports, relative imports resolved against its package."""
    name = module_name(path)
    package = name if path.name == "__init__.py" else name.rsplit(".", 1)[0]
    return imports_in(path.read_text(encoding="utf-8"), package)


def imports_in(text: str, package: str) -> Iterator[tuple[str, int]]:
    for node in ast.walk(ast.parse(text)):
        if isinstance(node, ast.Import):
            yield from ((alias.name, node.lineno) for alias in node.names)
        elif isinstance(node, ast.ImportFrom):
            if node.level:
                base = package.rsplit(".", node.level - 1)[0] if node.level > 1 else package
                yield (f"{base}.{node.module}" if node.module else base), node.lineno
            else:
                yield node.module or "", node.lineno


def crossings() -> Iterator[tuple[str, str, str]]:
    """(file:line, importing part, imported part) for every import between two parts of the package."""
    for path in sorted(PACKAGE.rglob("*.py")):
        source = part_of(module_name(path))
        for module, line in imported_modules(path):
            target = part_of(module)
            if target is not None and source is not None and target != source:
                yield f"{path.relative_to(PACKAGE.parent)}:{line}", source, target


@pytest.mark.parametrize("part", sorted(ALLOWED))
def test_each_stage_imports_only_earlier_stages(part: str) -> None:
    backwards = [f"{where} imports {target}" for where, source, target in crossings() if source == part]
    backwards = [entry for entry in backwards if entry.rsplit(" ", 1)[1] not in ALLOWED[part]]
    assert backwards == []


@pytest.mark.parametrize("tool", REVIEW_TOOLS)
def test_review_tools_do_not_import_each_other(tool: str) -> None:
    found = [
        f"{where} imports {target}"
        for where, source, target in crossings()
        if source == f"review.{tool}" and target not in REVIEW_SIBLING_ALLOWED
    ]
    assert found == []


def test_every_module_belongs_to_a_known_part() -> None:
    known = {*ALLOWED, *(f"review.{tool}" for tool in REVIEW_TOOLS), "review", "cli", "__main__", "policyc"}
    parts = {part_of(module_name(path)) for path in PACKAGE.rglob("*.py")}
    assert parts - known == set()


def test_the_walk_sees_relative_absolute_and_nested_imports() -> None:
    text = "from ..language import model\nimport policyc.review.diff\ndef f():\n    from . import kernel\n"
    found = [part_of(module) for module, _ in imports_in(text, "policyc.runtime")]
    assert found == ["language", "review.diff", "runtime"]
