"""Coverage-guided fuzzing of the policy loader and checks with atheris; run locally, never in CI.

    pip install atheris
    python tests/fuzz/fuzz_policy_loader.py -max_total_time=600 -max_len=4096 build/fuzz-corpus policies-demo/*/

Each input is the bytes of a policy file. The target fails (and atheris writes the input as
``crash-<hash>``) when the language stage ends in anything but a PolicyError, or refuses a policy
with an error that has no line. Found inputs belong in ``tests/language/test_fuzz.py`` or the check
fixtures as regression cases. See DEVELOPERS.md.
"""

from __future__ import annotations

import sys
import tempfile
from pathlib import Path

import atheris

with atheris.instrument_imports():
    from policyc.language.checks import check_document
    from policyc.language.diagnostics import PolicyError
    from policyc.language.source import parse_source_bytes

# Relative data paths resolve in an empty directory, so the checks never hash the developer's files.
EMPTY_DIRECTORY = Path(tempfile.mkdtemp(prefix="policyc-fuzz-"))


def check_policy_bytes(data: bytes) -> None:
    """Raise unless the bytes are checked, or refused with located errors."""
    try:
        diagnostics = check_document(parse_source_bytes(data, "fuzz.yaml", EMPTY_DIRECTORY)).diagnostics
    except PolicyError as exc:
        diagnostics = exc.diagnostics
    for diagnostic in diagnostics:
        if diagnostic.is_error and (diagnostic.line is None or diagnostic.col is None):
            raise AssertionError(f"refusal without a location: {diagnostic}")


def main() -> None:
    atheris.Setup(sys.argv, check_policy_bytes)
    atheris.Fuzz()


if __name__ == "__main__":
    main()
