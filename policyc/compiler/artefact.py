"""Write a Rule as the single-file artefact the runtime loads."""

from __future__ import annotations

from pathlib import Path

from policyc.files import write_bytes_atomically
from policyc.runtime import Rule
from policyc.runtime.artefact import decode_rule, encode_rule

__all__ = ["artefact_bytes", "write_artefact"]


def artefact_bytes(rule: Rule) -> bytes:
    manifest = {k: v for k, v in rule.manifest.items() if k not in ("arrays", "content_sha256")}
    return encode_rule(manifest, dict(rule.params))


def write_artefact(rule: Rule, path: str | Path) -> str:
    """Write atomically; return the content sha256 recorded in the file."""
    data = artefact_bytes(rule)
    manifest, _ = decode_rule(data)  # verify what we are about to publish
    write_bytes_atomically(Path(path), data)
    return str(manifest["content_sha256"])
