"""Generate a standalone Python module (numpy only) that decides exactly as the runtime does.

The module's kernel is the text of :mod:`policyc.runtime.kernel`, copied verbatim
(minus its docstring and imports), so there is one implementation of the math.
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
from policyc.runtime import Rule, kernel

__all__ = ["module_source", "write_module"]

_WIDTH = 110


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


def _kernel_body() -> str:
    """The runtime kernel's source without its module docstring and import lines."""
    source = Path(kernel.__file__).read_text(encoding="utf-8")
    tree = ast.parse(source)
    lines = source.splitlines()
    first_code = next(node.lineno for node in tree.body[1:] if not isinstance(node, ast.Import | ast.ImportFrom))
    return "\n".join(lines[first_code - 1 :]).rstrip() + "\n"


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

Use: decide(X) with X of shape (n, len(FEATURES)) in FEATURES order gives indices into ACTIONS.
Caution: the rule is only as good as its evidence model, priors and losses; validate it on
held-out data and defer to local regulations and qualified review.
"""
'''


def module_source(rule: Rule) -> str:
    """The text of the standalone module for ``rule``."""
    manifest = rule.manifest
    params = "\n".join(_array_literal(name, rule.params[name]) for name in sorted(rule.params))
    constants = f"""
from __future__ import annotations

import numpy as np

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

# --- kernel: the text of policyc/runtime/kernel.py ---

"""
    api = '''

# --- public API ---


def posteriors(X: object) -> np.ndarray:
    """P(class | x), shape (n, len(CLASSES)); NaN rows are invalid input."""
    return evaluate(X, EVIDENCE, PARAMS, len(FEATURES), INVALID_INPUT)[0]


def risks(X: object) -> np.ndarray:
    """Conditional risks R(a | x), shape (n, len(ACTIONS)), reject last."""
    return evaluate(X, EVIDENCE, PARAMS, len(FEATURES), INVALID_INPUT)[1]


def decide(X: object) -> np.ndarray:
    """Index into ACTIONS of the minimum-risk action per row."""
    _, conditional_risks, valid = evaluate(X, EVIDENCE, PARAMS, len(FEATURES), INVALID_INPUT)
    return choose(conditional_risks, valid, len(ACTIONS) - 1)
'''
    return _header(rule) + constants + _kernel_body() + api


def _tuple_literal(names: tuple[str, ...]) -> str:
    items = ", ".join(json.dumps(n, ensure_ascii=False) for n in names)
    return f"({items},)" if len(names) == 1 else f"({items})"


def write_module(rule: Rule, path: str | Path) -> None:
    write_bytes_atomically(Path(path), module_source(rule).encode("utf-8"))
