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
from typing import Literal

from pydantic.dataclasses import dataclass as report

from policyc.language.diagnostics import Diagnostic
from policyc.language.model import Policy
from policyc.language.source import SourceDocument
from policyc.review.shared.reports import REPORT_CONFIG
from policyc.runtime import Rule, load_rule

__all__ = ["POLICY_SUFFIXES", "LoadedRule", "RuleIdentity", "identity", "load_rule_or_policy"]

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


@report(frozen=True, config=REPORT_CONFIG)
class RuleIdentity:
    """What a report says about where a rule came from."""

    source: str
    kind: Literal["policy", "rule"]
    policy: str | None
    revision: int | None
    content_sha256: str | None
    policy_sha256: str | None
    training_sha256: str | None


def identity(loaded: LoadedRule) -> RuleIdentity:
    manifest = loaded.rule.manifest
    return RuleIdentity(
        str(loaded.path),
        "policy" if loaded.kind == "policy" else "rule",
        manifest.get("policy"),
        manifest.get("revision"),
        manifest.get("content_sha256"),
        manifest.get("policy_sha256"),
        manifest.get("training_sha256"),
    )
