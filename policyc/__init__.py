"""policyc: compile reviewed Bayes decision policies into frozen rules.

This file stays light: ``import policyc.runtime`` runs it first, and a service
that only loads rules must not pay for pydantic, yaml, scipy or click.
Convenience names are resolved lazily (PEP 562).
"""

from __future__ import annotations

from importlib import import_module
from typing import Any

__all__ = ["__version__", "check_file", "compile_policy", "load_rule"]

__version__ = "0.1.0"

_LAZY = {
    "check_file": "policyc.language.checks",
    "compile_policy": "policyc.compiler.build",
    "load_rule": "policyc.runtime",
}


def __getattr__(name: str) -> Any:
    if name in _LAZY:
        return getattr(import_module(_LAZY[name]), name)
    raise AttributeError(f"module 'policyc' has no attribute {name!r}")
