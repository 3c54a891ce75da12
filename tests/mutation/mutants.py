"""Mutants of a Python module, generated from its syntax tree.

Each mutant changes one expression: a comparison flipped or moved across its boundary,
an arithmetic or bitwise operator swapped, a constant changed, a negation dropped,
``and``/``or``, ``all``/``any``, ``min``/``max`` (and their numpy relatives) swapped,
an ``axis=`` argument changed, or a slice bound dropped. Annotations, decorators,
docstrings, ``__all__``, ``TYPE_CHECKING`` blocks and ``zip``'s ``strict=`` flag are left
alone: a change there cannot change a decision.

A mutant is named by a key that survives edits elsewhere in the file:
``path::function `before` -> `after```, with ``#2``, ``#3`` after the function when the
same change occurs more than once in it.
"""

from __future__ import annotations

import ast
import copy
from collections.abc import Callable, Iterator
from dataclasses import dataclass

__all__ = ["Mutant", "generate"]

# Each operator's replacements: the boundary move first, then the negation.
COMPARE_SWAPS: dict[type[ast.cmpop], tuple[type[ast.cmpop], ...]] = {
    ast.Lt: (ast.LtE, ast.GtE),
    ast.LtE: (ast.Lt, ast.Gt),
    ast.Gt: (ast.GtE, ast.LtE),
    ast.GtE: (ast.Gt, ast.Lt),
    ast.Eq: (ast.NotEq,),
    ast.NotEq: (ast.Eq,),
    ast.Is: (ast.IsNot,),
    ast.IsNot: (ast.Is,),
    ast.In: (ast.NotIn,),
    ast.NotIn: (ast.In,),
}
BINARY_SWAPS: dict[type[ast.operator], type[ast.operator]] = {
    ast.Add: ast.Sub,
    ast.Sub: ast.Add,
    ast.Mult: ast.Div,
    ast.Div: ast.Mult,
    ast.FloorDiv: ast.Mult,
    ast.Mod: ast.Mult,
    ast.Pow: ast.Mult,
    ast.BitAnd: ast.BitOr,
    ast.BitOr: ast.BitAnd,
    ast.BitXor: ast.BitOr,
    ast.LShift: ast.RShift,
    ast.RShift: ast.LShift,
}
BOOLEAN_SWAPS: dict[type[ast.boolop], type[ast.boolop]] = {ast.And: ast.Or, ast.Or: ast.And}
# Functions and methods whose name swaps with a twin: reductions and extremes.
NAME_SWAPS = {
    "all": "any",
    "any": "all",
    "min": "max",
    "max": "min",
    "minimum": "maximum",
    "maximum": "minimum",
    "argmin": "argmax",
    "argmax": "argmin",
    "nanmin": "nanmax",
    "nanmax": "nanmin",
    "amin": "amax",
    "amax": "amin",
}


@dataclass(frozen=True)
class Mutant:
    """One changed expression of a module, with the whole mutated source."""

    path: str
    line: int
    function: str
    before: str
    after: str
    source: str
    end_line: int

    @property
    def key(self) -> str:
        """The name under which an equivalent mutant is listed."""
        return f"{self.path}::{self.function} `{self.before}` -> `{self.after}`"


Replacement = Callable[[ast.AST], ast.AST]


def _with(node: ast.AST, **fields: object) -> ast.AST:
    """A copy of ``node`` with some fields replaced."""
    changed = copy.copy(node)
    for name, value in fields.items():
        setattr(changed, name, value)
    return changed


def _is_text(node: ast.AST) -> bool:
    return isinstance(node, ast.JoinedStr) or (isinstance(node, ast.Constant) and isinstance(node.value, str | bytes))


def _changed_constant(value: object) -> object | None:
    """A different constant of the same kind: booleans negated, n -> n + 1, x -> 2x (0.0 -> 1.0)."""
    if isinstance(value, bool):
        return not value
    if isinstance(value, int):
        return value + 1
    if isinstance(value, float):
        return 2.0 * value if value else 1.0
    return None


def _changed_axis(value: ast.expr) -> ast.expr | None:
    """``axis=0`` <-> ``axis=1``, ``axis=-1`` -> ``axis=0``."""
    if isinstance(value, ast.Constant) and isinstance(value.value, int) and not isinstance(value.value, bool):
        return ast.Constant(1 if value.value == 0 else 0)
    if isinstance(value, ast.UnaryOp) and isinstance(value.op, ast.USub):
        return ast.Constant(0)
    return None


def _replacements(node: ast.AST) -> Iterator[Replacement]:
    """Every single-expression change of ``node`` (not of its children)."""
    if isinstance(node, ast.Compare):
        for index, op in enumerate(node.ops):
            for swap in COMPARE_SWAPS.get(type(op), ()):
                ops = [*node.ops[:index], swap(), *node.ops[index + 1 :]]
                yield lambda n, ops=ops: _with(n, ops=ops)
    elif isinstance(node, ast.BinOp | ast.AugAssign) and type(node.op) in BINARY_SWAPS:
        if not isinstance(node, ast.BinOp) or not (_is_text(node.left) or _is_text(node.right)):
            swap_op = BINARY_SWAPS[type(node.op)]
            yield lambda n: _with(n, op=swap_op())
    elif isinstance(node, ast.BoolOp):
        yield lambda n: _with(n, op=BOOLEAN_SWAPS[type(node.op)]())
    elif isinstance(node, ast.UnaryOp) and isinstance(node.op, ast.USub | ast.Not | ast.Invert):
        yield lambda n: n.operand  # type: ignore[attr-defined]
    elif isinstance(node, ast.Constant):
        changed = _changed_constant(node.value)
        if changed is not None:
            yield lambda n: ast.Constant(changed)
    elif isinstance(node, ast.Call):
        func = node.func
        if isinstance(func, ast.Name) and func.id in NAME_SWAPS:
            yield lambda n: _with(n, func=ast.Name(NAME_SWAPS[func.id], ast.Load()))
        elif isinstance(func, ast.Attribute) and func.attr in NAME_SWAPS:
            yield lambda n: _with(n, func=_with(func, attr=NAME_SWAPS[func.attr]))
        for index, keyword in enumerate(node.keywords):
            new_axis = _changed_axis(keyword.value) if keyword.arg == "axis" else None
            if new_axis is not None:
                keywords = [*node.keywords[:index], ast.keyword("axis", new_axis), *node.keywords[index + 1 :]]
                yield lambda n, keywords=keywords: _with(n, keywords=keywords)
    elif isinstance(node, ast.Slice):
        for bound in ("lower", "upper"):
            if getattr(node, bound) is not None:
                yield lambda n, bound=bound: _with(n, **{bound: None})


def _left_alone(node: ast.AST) -> bool:
    """Statements whose mutants cannot change behaviour."""
    if isinstance(node, ast.If) and "TYPE_CHECKING" in ast.unparse(node.test):
        return True
    if isinstance(node, ast.Assign):
        return any(isinstance(target, ast.Name) and target.id == "__all__" for target in node.targets)
    return isinstance(node, ast.Expr) and isinstance(node.value, ast.Constant) and isinstance(node.value.value, str)


def _axis_constants(node: ast.Call) -> list[ast.AST]:
    """The constant inside an ``axis=`` argument, which changes through the axis mutation only, and the
    ``strict=`` flag of ``zip``: a guard against lengths that differ, never a change of any value."""
    found: list[ast.AST] = []
    for keyword in node.keywords:
        if keyword.arg == "axis" or (keyword.arg == "strict" and isinstance(node.func, ast.Name)):
            found.extend(ast.walk(keyword.value))
    return found


def _sites(tree: ast.Module) -> Iterator[tuple[ast.AST, ast.AST, str]]:
    """Every node that may be mutated, its parent and its enclosing function, in a fixed order."""
    skipped: set[int] = set()
    stack: list[tuple[ast.AST, ast.AST | None, str]] = [(tree, None, "<module>")]
    while stack:
        node, parent, scope = stack.pop()
        if id(node) in skipped or _left_alone(node):
            continue
        if parent is not None:
            yield node, parent, scope
        if isinstance(node, ast.FunctionDef | ast.AsyncFunctionDef | ast.ClassDef):
            scope = node.name if scope == "<module>" else f"{scope}.{node.name}"
            skipped.update(id(child) for child in node.decorator_list)
            if not isinstance(node, ast.ClassDef):
                skipped.update(id(a.annotation) for a in ast.walk(node.args) if isinstance(a, ast.arg) and a.annotation)
                if node.returns is not None:
                    skipped.add(id(node.returns))
        elif isinstance(node, ast.AnnAssign):
            skipped.add(id(node.annotation))
        elif isinstance(node, ast.Call):
            skipped.update(id(constant) for constant in _axis_constants(node))
        children = list(ast.iter_child_nodes(node))
        stack.extend((child, node, scope) for child in reversed(children))


def _replace(parent: ast.AST, old: ast.AST, new: ast.AST) -> None:
    for name, value in ast.iter_fields(parent):
        if value is old:
            setattr(parent, name, new)
            return
        if isinstance(value, list):
            for index, item in enumerate(value):
                if item is old:
                    value[index] = new
                    return
    raise ValueError("node not found in its parent")


def generate(source: str, path: str) -> list[Mutant]:
    """All mutants of a module's source, in the order of the source.

    Parameters
    ----------
    source : str
        The module's text.
    path : str
        Its path relative to the repository root (part of each mutant's key).
    """
    tree = ast.parse(source)
    mutants: list[Mutant] = []
    seen: dict[str, int] = {}
    for node, parent, scope in list(_sites(tree)):
        before = ast.unparse(node)
        for replacement in _replacements(node):
            changed = replacement(node)
            _replace(parent, node, changed)
            mutated = ast.unparse(ast.fix_missing_locations(tree))
            after = ast.unparse(changed)
            _replace(parent, changed, node)
            base = f"{scope} `{before}` -> `{after}`"
            seen[base] = seen.get(base, 0) + 1
            function = scope if seen[base] == 1 else f"{scope}#{seen[base]}"
            line = getattr(node, "lineno", getattr(parent, "lineno", 0))
            end_line = getattr(node, "end_lineno", None) or line
            mutants.append(Mutant(path, line, function, before, after, mutated, end_line))
    return mutants
