"""A rule on its way to worker processes: its artefact bytes, loaded (and verified) once per process."""

from __future__ import annotations

from dataclasses import dataclass

from policyc.compiler.artefact import artefact_bytes
from policyc.runtime import Rule, shared_rule_from_bytes

__all__ = ["ShippedRule"]


@dataclass(frozen=True)
class ShippedRule:
    """The canonical artefact bytes of a rule (a rule file's own bytes, or those a policy compiles to), so a
    worker receives no pickled object of ours and checks the content hash before using it."""

    data: bytes

    @classmethod
    def of(cls, rule: Rule) -> ShippedRule:
        return cls(artefact_bytes(rule))

    def load(self) -> Rule:
        """The rule, decoded once per process and kept for the process's later partitions."""
        return shared_rule_from_bytes(self.data, "<shipped rule>")
