"""Load and run compiled rules. Imports numpy and the standard library only.

``load_rule("build/packhouse.rule")`` verifies the file and returns a :class:`Rule`;
``rule.decide_names(X)`` decides an (n, d) array of features in ``rule.features`` order.
"""

from __future__ import annotations

from .artefact import FORMAT_NAME, FORMAT_VERSION
from .errors import ArtefactError, InputError, PolicycError
from .rule import Explanation, Rule, load_rule

__all__ = [
    "FORMAT_NAME",
    "FORMAT_VERSION",
    "ArtefactError",
    "Explanation",
    "InputError",
    "PolicycError",
    "Rule",
    "load_rule",
]
