"""The policy language: strict YAML source with positions, pydantic models, diagnostics and consistency checks.

Stages, in order: ``source`` (bytes -> located data), ``model`` (located data -> Policy),
``checks`` (Policy -> diagnostics, one rule per function in an ordered registry).
"""
