"""The rule artefact format, owned by the runtime.

One file, a ZIP archive with stored (uncompressed) members, so any tool can
list it and the bytes do not depend on a zlib version:

* ``manifest.json``: canonical JSON (sorted keys, no spaces); see FORMAT_NAME,
  FORMAT_VERSION and ``schemas/rule-manifest.schema.json``;
* ``arrays/<name>.npy``: each parameter as a little-endian float64 .npy (format 1.0).

``manifest["content_sha256"]`` is the sha256 of the manifest without that
field, followed by each array's name and .npy bytes in name order. Members
carry a fixed timestamp and mode, so equal content gives equal bytes.
Nothing is ever unpickled (``allow_pickle=False``).
"""

from __future__ import annotations

import hashlib
import io
import json
import zipfile
from typing import Any, Final

import numpy as np

from .errors import ArtefactError

__all__ = [
    "FORMAT_NAME",
    "FORMAT_VERSION",
    "ArtefactError",
    "content_hash",
    "decode_rule",
    "encode_rule",
]

FORMAT_NAME: Final = "policyc-rule"
FORMAT_VERSION = "1.0"
"""major.minor: a reader refuses a newer major version and accepts any minor version of its own major."""

_MANIFEST = "manifest.json"
_ARRAY_DIR = "arrays/"
_FIXED_TIME = (1980, 1, 1, 0, 0, 0)
_MAX_MEMBER_BYTES = 1 << 30


def _canonical(manifest: dict[str, Any]) -> bytes:
    return json.dumps(manifest, sort_keys=True, separators=(",", ":"), ensure_ascii=False, allow_nan=False).encode()


def _npy_bytes(array: np.ndarray) -> bytes:
    buffer = io.BytesIO()
    np.lib.format.write_array(
        buffer, np.asarray(array, dtype="<f8").copy(order="C"), version=(1, 0), allow_pickle=False
    )
    return buffer.getvalue()


def content_hash(manifest: dict[str, Any], arrays: dict[str, bytes]) -> str:
    digest = hashlib.sha256(_canonical({k: v for k, v in manifest.items() if k != "content_sha256"}))
    for name in sorted(arrays):
        digest.update(name.encode())
        digest.update(arrays[name])
    return digest.hexdigest()


def encode_rule(manifest: dict[str, Any], params: dict[str, np.ndarray]) -> bytes:
    """Serialise a manifest and its arrays; fills in ``arrays`` and ``content_sha256`` of the manifest."""
    blobs = {name: _npy_bytes(array) for name, array in params.items()}
    full = dict(manifest)
    full["arrays"] = {name: list(np.shape(array)) for name, array in sorted(params.items())}
    full["content_sha256"] = content_hash(full, blobs)
    output = io.BytesIO()
    with zipfile.ZipFile(output, "w", compression=zipfile.ZIP_STORED) as archive:
        _write_member(archive, _MANIFEST, _canonical(full))
        for name in sorted(blobs):
            _write_member(archive, f"{_ARRAY_DIR}{name}.npy", blobs[name])
    return output.getvalue()


def _write_member(archive: zipfile.ZipFile, name: str, data: bytes) -> None:
    info = zipfile.ZipInfo(name, date_time=_FIXED_TIME)
    info.create_system = 3
    info.external_attr = 0o644 << 16
    info.compress_type = zipfile.ZIP_STORED
    archive.writestr(info, data)


def decode_rule(data: bytes, origin: str = "<rule>") -> tuple[dict[str, Any], dict[str, np.ndarray]]:
    """Read and verify an artefact: format, version, content hash, array shapes. Raise ArtefactError."""
    try:
        archive = zipfile.ZipFile(io.BytesIO(data))
    except zipfile.BadZipFile:
        raise ArtefactError(f"{origin}: not a policyc rule file (not a ZIP archive)") from None
    with archive:
        manifest = _read_manifest(archive, origin)
        blobs = {}
        for name in manifest["arrays"]:
            member = f"{_ARRAY_DIR}{name}.npy"
            blobs[name] = _read_member(archive, member, origin)
    actual = content_hash(manifest, blobs)
    if actual != manifest.get("content_sha256"):
        raise ArtefactError(
            f"{origin}: content hash mismatch (manifest says {manifest.get('content_sha256')}, content is "
            f"{actual}); the file was changed after it was compiled"
        )
    params = {name: _read_array(blob, name, origin) for name, blob in blobs.items()}
    for name, shape in manifest["arrays"].items():
        if list(params[name].shape) != list(shape):
            raise ArtefactError(f"{origin}: array {name!r} has shape {params[name].shape}, manifest says {shape}")
    return manifest, params


def _read_member(archive: zipfile.ZipFile, member: str, origin: str) -> bytes:
    try:
        info = archive.getinfo(member)
    except KeyError:
        raise ArtefactError(f"{origin}: member {member!r} is missing") from None
    if info.file_size > _MAX_MEMBER_BYTES:
        raise ArtefactError(f"{origin}: member {member!r} is implausibly large")
    try:
        return archive.read(info)
    except (zipfile.BadZipFile, OSError) as exc:
        raise ArtefactError(f"{origin}: member {member!r} is corrupt: {exc}") from None


def _read_manifest(archive: zipfile.ZipFile, origin: str) -> dict[str, Any]:
    try:
        manifest = json.loads(_read_member(archive, _MANIFEST, origin))
    except (json.JSONDecodeError, UnicodeDecodeError):
        raise ArtefactError(f"{origin}: manifest.json is not valid JSON") from None
    if not isinstance(manifest, dict) or manifest.get("format") != FORMAT_NAME:
        raise ArtefactError(f"{origin}: manifest field 'format' is not {FORMAT_NAME!r}")
    _check_version(str(manifest.get("format_version", "")), origin)
    if not isinstance(manifest.get("arrays"), dict):
        raise ArtefactError(f"{origin}: manifest field 'arrays' is missing")
    return manifest


def _check_version(version: str, origin: str) -> None:
    try:
        major = int(version.split(".")[0])
    except ValueError:
        raise ArtefactError(f"{origin}: manifest field 'format_version' is {version!r}, not major.minor") from None
    supported = int(FORMAT_VERSION.split(".")[0])
    if major > supported:
        raise ArtefactError(
            f"{origin}: format_version {version} is newer than this runtime reads ({FORMAT_VERSION}); "
            "upgrade policyc where the rule is loaded"
        )
    if major < supported:
        raise ArtefactError(f"{origin}: format_version {version} is older than {FORMAT_VERSION}; recompile the policy")


def _read_array(blob: bytes, name: str, origin: str) -> np.ndarray:
    try:
        array = np.lib.format.read_array(io.BytesIO(blob), allow_pickle=False)
    except (ValueError, OSError) as exc:
        raise ArtefactError(f"{origin}: array {name!r} is not a valid .npy: {exc}") from None
    if array.dtype != np.dtype("<f8"):
        raise ArtefactError(f"{origin}: array {name!r} has dtype {array.dtype}, expected float64")
    array.setflags(write=False)
    return array
