"""Generate a standalone Python module (numpy only) that decides exactly as the runtime does.

The module's input reader and kernel are the text of :mod:`policyc.runtime.inputs` and
:mod:`policyc.runtime.kernel`, copied verbatim (minus their docstrings and imports), so there is
one implementation of the input handling and the math.
Parameters are written as Python float literals via ``repr``, which round-trips
every float64 exactly.
"""

from __future__ import annotations

import ast
import json
import math
import textwrap
from pathlib import Path

import numpy as np

from policyc.files import write_bytes_atomically
from policyc.render import format_matrix
from policyc.runtime import Rule, inputs, kernel

__all__ = ["module_source", "write_module"]

_WIDTH = 110

_COPIED = (inputs, kernel)
"""Runtime files whose text the module holds, in dependency order; they import numpy, the standard library
and each other only."""


def _float_literal(value: float) -> str:
    if math.isnan(value):
        return "np.nan"
    if math.isinf(value):
        return "np.inf" if value > 0 else "-np.inf"
    return repr(float(value))


def _array_literal(name: str, array: np.ndarray) -> str:
    if array.ndim == 0:
        return f"    {json.dumps(name)}: np.array({_float_literal(float(array))}),"
    rows = array.reshape(-1, array.shape[-1]) if array.ndim > 1 else array[None, :]
    body = []
    for row in rows:
        numbers = ", ".join(_float_literal(float(v)) for v in row)
        wrapped = textwrap.fill(numbers, width=_WIDTH - 12, break_long_words=False, break_on_hyphens=False)
        body.append(textwrap.indent("[" + wrapped + "],", " " * 8))
    inner = "\n".join(body)
    if array.ndim == 1:
        inner = inner.strip().removeprefix("[").removesuffix("],")
        return f"    {json.dumps(name)}: np.array(\n        [\n            {inner.strip()}\n        ]\n    ),"
    return f"    {json.dumps(name)}: np.array(\n        [\n{textwrap.indent(inner, '    ')}\n        ]\n    ),"


def _copied_code() -> tuple[list[str], str]:
    """The import lines (other than between the copied files) and the bodies of the copied runtime files."""
    imports: list[str] = []
    bodies = []
    for module in _COPIED:
        source = Path(str(module.__file__)).read_text(encoding="utf-8")
        lines = source.splitlines()
        statements = ast.parse(source).body[1:]  # after the module docstring
        first_code = next(i for i, node in enumerate(statements) if not isinstance(node, ast.Import | ast.ImportFrom))
        for node in statements[:first_code]:
            line = "\n".join(lines[node.lineno - 1 : node.end_lineno])
            relative = isinstance(node, ast.ImportFrom) and node.level > 0
            imports += [] if relative or line in imports else [line]
        bodies.append("\n".join(lines[statements[first_code].lineno - 1 :]).rstrip() + "\n")
    return imports, "\n\n".join(bodies)


def _import_block(imports: list[str]) -> str:
    """Import lines grouped and ordered as isort does: ``__future__``, the standard library, then numpy;
    ``import x`` lines before ``from x import y`` lines in each group."""
    groups: dict[int, list[str]] = {}
    for line in imports:
        groups.setdefault(0 if "__future__" in line else 2 if "numpy" in line else 1, []).append(line)
    return "\n\n".join(
        "\n".join(sorted(groups[key], key=lambda line: (line.startswith("from "), line))) for key in sorted(groups)
    )


def _header(rule: Rule) -> str:
    manifest = rule.manifest
    priors = "\n".join(f"    {name}: {manifest['priors'][name]:.6g}" for name in rule.classes)
    loss = format_matrix(np.asarray(rule.params["loss"]), rule.actions, rule.classes, "action", "true class")
    unit = f" ({manifest['loss_unit']})" if manifest.get("loss_unit") else ""
    title = f"Decision rule {manifest['policy']!r} revision {manifest['revision']}"
    return f'''r"""{title}, compiled by policyc {manifest["policyc_version"]}.

Generated file: do not edit; change the policy and compile again.
Policy sha256: {manifest["policy_sha256"]}
Rule content sha256: {manifest.get("content_sha256")}
Evidence: {manifest["evidence"]["kind"]}; invalid input: {manifest["invalid_input"]}

Deployment priors:
{priors}

Loss{unit}, loss[action][true class]; the reject action, if any, is the last row:
{textwrap.indent(loss, "    ")}

Use: decide(X) gives indices into ACTIONS; X is an array of shape (n, len(FEATURES)) in FEATURES
order, or a table (DataFrame, pyarrow Table, mapping of name to column) read by column name.
Caution: the rule is only as good as its evidence model, priors and losses; validate it on
held-out data and defer to local regulations and qualified review.
"""
'''


def module_source(rule: Rule) -> str:
    """The text of the standalone module for ``rule``."""
    manifest = rule.manifest
    params = "\n".join(_array_literal(name, rule.params[name]) for name in sorted(rule.params))
    imports, copied = _copied_code()
    constants = f"""
{_import_block(imports)}

POLICY = {json.dumps(manifest["policy"])}
REVISION = {int(manifest["revision"])}
POLICY_SHA256 = {json.dumps(manifest["policy_sha256"])}
RULE_SHA256 = {json.dumps(manifest.get("content_sha256"))}
CLASSES = {_tuple_literal(rule.classes)}
ACTIONS = {_tuple_literal(rule.actions)}
FEATURES = {_tuple_literal(rule.features)}
EVIDENCE = {json.dumps(rule.evidence)}
INVALID_INPUT = {json.dumps(rule.invalid_input)}

PARAMS = {{
{params}
}}

# --- input reader and kernel: the text of policyc/runtime/inputs.py and policyc/runtime/kernel.py ---

"""
    api = '''

PLAN = plan(EVIDENCE, PARAMS)

# --- public API ---


def posteriors(X: object) -> np.ndarray:
    """P(class | x), shape (n, len(CLASSES)); NaN rows are invalid input.

    X: a 2-D array with columns in FEATURES order, or a table with named columns (pandas or polars
    DataFrame, pyarrow Table or RecordBatch, mapping of column name to 1-D array), read by name.
    """
    return evaluate(X, EVIDENCE, PLAN, FEATURES, INVALID_INPUT)[0]


def risks(X: object) -> np.ndarray:
    """Conditional risks R(a | x), shape (n, len(ACTIONS)), reject last; X as for posteriors."""
    return evaluate(X, EVIDENCE, PLAN, FEATURES, INVALID_INPUT)[1]


def decide(X: object) -> np.ndarray:
    """Index into ACTIONS of the minimum-risk action per row; X as for posteriors."""
    prepared = feature_matrix(X, FEATURES)
    actions, valid = decide_matrix(prepared, EVIDENCE, PLAN, len(ACTIONS) - 1)
    if INVALID_INPUT == "error" and not valid.all():
        raise InputError(invalid_rows_message(valid, prepared=prepared, features=FEATURES))
    return actions
'''
    return _header(rule) + constants + copied + api


def _tuple_literal(names: tuple[str, ...]) -> str:
    items = ", ".join(json.dumps(n, ensure_ascii=False) for n in names)
    return f"({items},)" if len(names) == 1 else f"({items})"


def write_module(rule: Rule, path: str | Path) -> None:
    write_bytes_atomically(Path(path), module_source(rule).encode("utf-8"))
