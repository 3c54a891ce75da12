"""Load and run compiled rules. Imports numpy and the standard library only.

from policyc.runtime import load_rule
rule = load_rule("build/packhouse.rule")
rule.decide_names(X)
"""

from __future__ import annotations

from policyc.runtime.artefact import FORMAT_NAME, FORMAT_VERSION, ArtefactError
from policyc.runtime.kernel import InputError
from policyc.runtime.rule import Explanation, Rule, load_rule

__all__ = ["FORMAT_NAME", "FORMAT_VERSION", "ArtefactError", "Explanation", "InputError", "Rule", "load_rule"]
