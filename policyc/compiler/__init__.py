"""Compile a checked Policy and its fitted evidence into a Rule, and emit it (artefact, standalone module).

``build`` chains the stages; ``manifest`` is the artefact's described metadata; ``artefact`` and ``module``
are the two emitters.
"""

from __future__ import annotations

from policyc.compiler.artefact import write_artefact
from policyc.compiler.build import compile_policy
from policyc.compiler.module import module_source, write_module

__all__ = ["compile_policy", "module_source", "write_artefact", "write_module"]
