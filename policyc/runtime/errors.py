"""The base of policyc's error family, and the runtime's own errors. Standard library only.

Every refusal policyc makes is a :class:`PolicycError`: it carries the exit code the command line
ends with and presents itself as text (for people) and as a JSON object (for tools). The base lives
in the runtime because the runtime may import nothing else of policyc, yet its errors belong to the
family; :mod:`policyc.errors` re-exports it with the other stages' subclasses.
"""

from __future__ import annotations

from typing import ClassVar

from .inputs import InputError as ReaderInputError

__all__ = ["ArtefactError", "InputError", "PolicycError"]


class PolicycError(Exception):
    """Base of every error policyc reports instead of a traceback.

    ``exit_code`` is what the command line exits with (1: a policy, data, rule or input that cannot
    be used); ``stage`` names the part of policyc that refused.
    """

    exit_code: ClassVar[int] = 1
    stage: ClassVar[str] = "policyc"

    @property
    def message(self) -> str:
        return str(self)

    def as_text(self) -> str:
        """What a person reads on standard error."""
        return f"error: {self.message}"

    def as_json(self) -> dict[str, object]:
        """The stable JSON form: ``{"error": type, "stage": ..., "message": ..., "exit_code": n}``."""
        return {"error": type(self).__name__, "stage": self.stage, "message": self.message, "exit_code": self.exit_code}


class ArtefactError(PolicycError, ValueError):
    """A rule file is corrupt, tampered with, or of a format this runtime cannot read."""

    stage = "runtime"


class InputError(PolicycError, ReaderInputError):
    """The input cannot be decided on: wrong shape or type, or invalid rows under ``invalid_input: error``.

    The input reader raises its own :class:`policyc.runtime.inputs.InputError` (it imports numpy only, as
    the standalone module copies it); the runtime re-raises it as this class, which is both.
    """

    stage = "runtime"
