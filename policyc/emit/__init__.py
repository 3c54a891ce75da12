"""Emitters: the frozen artefact and the standalone NumPy module."""

from __future__ import annotations

from policyc.emit.artefact import write_artefact
from policyc.emit.module import module_source, write_module

__all__ = ["module_source", "write_artefact", "write_module"]
