"""Load and run compiled rules. Imports numpy and the standard library only.

``load_rule("build/packhouse.rule")`` verifies the file and returns a :class:`Rule`;
``rule.decide_names(X)`` decides an (n, d) array of features in ``rule.features`` order, or a table
(pandas/polars DataFrame, pyarrow Table, mapping of name to column) by column name;
``rule.explain(X).reason`` says why each row got its action (``REASONS``).
"""

from __future__ import annotations

from .artefact import FORMAT_NAME, FORMAT_VERSION
from .errors import ArtefactError, InputError, PolicycError
from .rule import REASONS, Explanation, Rule, load_rule, rule_from_bytes, shared_rule_from_bytes

__all__ = [
    "FORMAT_NAME",
    "FORMAT_VERSION",
    "REASONS",
    "ArtefactError",
    "Explanation",
    "InputError",
    "PolicycError",
    "Rule",
    "load_rule",
    "rule_from_bytes",
    "shared_rule_from_bytes",
]
