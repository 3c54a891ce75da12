"""A rule from either end of the flow: a policy file (checked, fitted, compiled) or a compiled rule file.

``diff``, ``evaluate`` and ``plot`` accept both. A path ending in ``.yaml`` or
``.yml`` is a policy: it is checked and compiled in memory (nothing is
written), so its evidence is fitted and its source positions are kept for
located reports. Anything else is read as a rule artefact with
:func:`policyc.runtime.load_rule`.
"""

from __future__ import annotations

from dataclasses import dataclass
from pathlib import Path
from typing import Any

from policyc.language.diagnostics import Diagnostic
from policyc.language.model import Policy
from policyc.language.source import SourceDocument
from policyc.runtime import Rule, load_rule

__all__ = ["POLICY_SUFFIXES", "LoadedRule", "identity", "load_rule_or_policy"]

POLICY_SUFFIXES = (".yaml", ".yml")


@dataclass(frozen=True)
class LoadedRule:
    """A compiled rule, with the policy and its source when it came from a policy file."""

    path: Path
    rule: Rule
    document: SourceDocument | None = None
    policy: Policy | None = None
    diagnostics: tuple[Diagnostic, ...] = ()

    @property
    def kind(self) -> str:
        return "policy" if self.document is not None else "rule"

    @property
    def title(self) -> str:
        """``name rREVISION``, as reviewers call a policy version."""
        return f"{self.rule.manifest.get('policy')} r{self.rule.manifest.get('revision')}"


def load_rule_or_policy(path: str | Path) -> LoadedRule:
    """Compile a policy file in memory, or load a rule file.

    Raises a :class:`policyc.language.diagnostics.PolicyError` subclass for a policy with errors and
    :class:`policyc.runtime.ArtefactError` for a rule file that cannot be read.
    """
    file = Path(path)
    if file.suffix.lower() in POLICY_SUFFIXES:
        from policyc.compiler.build import compile_policy  # the compiler is only needed for policy files

        compiled = compile_policy(file)
        return LoadedRule(file, compiled.rule, compiled.document, compiled.policy, compiled.diagnostics)
    return LoadedRule(file, load_rule(file))


def identity(loaded: LoadedRule) -> dict[str, Any]:
    """What a report says about where a rule came from (JSON-ready)."""
    manifest = loaded.rule.manifest
    return {
        "source": str(loaded.path),
        "kind": loaded.kind,
        "policy": manifest.get("policy"),
        "revision": manifest.get("revision"),
        "content_sha256": manifest.get("content_sha256"),
        "policy_sha256": manifest.get("policy_sha256"),
        "training_sha256": manifest.get("training_sha256"),
    }
