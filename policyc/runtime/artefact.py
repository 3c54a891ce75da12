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

The writer is deterministic, so a reader accepts exactly one byte string per
content: after decoding, it encodes the content again and refuses the file
unless the bytes are identical. ZIP headers, the central directory, junk
before or after the archive, member order and JSON spelling are thereby all
covered, though the content hash covers only the content. Sizes are checked
against caps before anything is read, and members must be stored, so nothing
is ever inflated. The hash is a checksum against damage, not a signature: who
can write the file can recompute it (pin the sha256 of the file you reviewed).
"""

from __future__ import annotations

import hashlib
import io
import json
import math
import re
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
    "pack_members",
]

FORMAT_NAME: Final = "policyc-rule"
FORMAT_VERSION = "1.0"
"""major.minor: a reader refuses a newer major version and accepts any minor version of its own major."""

MAX_RULE_BYTES = 1 << 30
"""Largest rule file read (1 GiB): a Gaussian rule with 100 classes of 1,000 features holds 800 MB of arrays."""

MAX_MANIFEST_BYTES = 1 << 24
"""Largest manifest.json (16 MiB); compiled manifests are a few kilobytes."""

_MAX_MANIFEST_DEPTH = 32
"""Deepest nesting of manifest values; compiled manifests nest at most five deep."""

_MANIFEST = "manifest.json"
_ARRAY_DIR = "arrays/"
_ARRAY_NAME = re.compile(r"[a-z][a-z0-9_]{0,63}")
_FIXED_TIME = (1980, 1, 1, 0, 0, 0)


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
    members = {_MANIFEST: _canonical(full)} | {f"{_ARRAY_DIR}{name}.npy": blobs[name] for name in sorted(blobs)}
    return pack_members(members)


def pack_members(members: dict[str, bytes]) -> bytes:
    """A ZIP archive of ``members`` in the given order, stored, with the writer's fixed timestamp and mode."""
    output = io.BytesIO()
    with zipfile.ZipFile(output, "w", compression=zipfile.ZIP_STORED) as archive:
        for name, data in members.items():
            _write_member(archive, name, data)
    return output.getvalue()


def _write_member(archive: zipfile.ZipFile, name: str, data: bytes) -> None:
    info = zipfile.ZipInfo(name, date_time=_FIXED_TIME)
    info.create_system = 3
    info.external_attr = 0o644 << 16
    info.compress_type = zipfile.ZIP_STORED
    archive.writestr(info, data)


def decode_rule(data: bytes, origin: str = "<rule>") -> tuple[dict[str, Any], dict[str, np.ndarray]]:
    """Read and verify an artefact: size caps, ZIP structure, manifest, arrays, content hash, and that the
    bytes are exactly the canonical encoding of what they hold. Raise ArtefactError naming what failed."""
    if len(data) > MAX_RULE_BYTES:
        raise ArtefactError(f"{origin}: {len(data)} bytes is larger than a rule file may be ({MAX_RULE_BYTES})")
    archive = _open_archive(data, origin)
    with archive:
        manifest = _read_manifest(archive, origin)
        blobs = {name: _read_member(archive, f"{_ARRAY_DIR}{name}.npy", origin) for name in manifest["arrays"]}
    actual = content_hash(manifest, blobs)
    if actual != manifest.get("content_sha256"):
        raise ArtefactError(
            f"{origin}: content hash mismatch (manifest says {manifest.get('content_sha256')}, content is "
            f"{actual}); the file was changed after it was compiled"
        )
    params = {name: _read_array(blob, name, manifest["arrays"][name], origin) for name, blob in blobs.items()}
    unsigned = {k: v for k, v in manifest.items() if k not in ("arrays", "content_sha256")}
    if encode_rule(unsigned, params) != data:
        raise ArtefactError(
            f"{origin}: the file is not the canonical encoding of its content (ZIP headers, member order or "
            "bytes outside the archive were changed after it was compiled)"
        )
    return manifest, params


def _open_archive(data: bytes, origin: str) -> zipfile.ZipFile:
    try:
        archive = zipfile.ZipFile(io.BytesIO(data))
    except Exception as exc:  # zipfile raises undocumented types on hostile bytes (EOFError, ValueError, ...)
        raise ArtefactError(f"{origin}: not a policyc rule file (not a readable ZIP archive: {_reason(exc)})") from None
    for info in archive.infolist():
        if info.compress_type != zipfile.ZIP_STORED or info.flag_bits & 0x1:
            archive.close()
            raise ArtefactError(
                f"{origin}: member {info.filename!r} is compressed or encrypted; rule files store members as they are"
            )
    return archive


def _read_member(archive: zipfile.ZipFile, member: str, origin: str, cap: int = MAX_RULE_BYTES) -> bytes:
    try:
        info = archive.getinfo(member)
    except KeyError:
        raise ArtefactError(f"{origin}: member {member!r} is missing") from None
    if info.file_size > cap or info.compress_size > cap:
        raise ArtefactError(f"{origin}: member {member!r} declares {info.file_size} bytes, more than {cap}")
    try:
        return archive.read(info)
    except Exception as exc:  # CRC errors, bad local headers, truncation: zipfile's types vary
        raise ArtefactError(f"{origin}: member {member!r} is corrupt ({_reason(exc)})") from None


def _read_manifest(archive: zipfile.ZipFile, origin: str) -> dict[str, Any]:
    raw = _read_member(archive, _MANIFEST, origin, MAX_MANIFEST_BYTES)
    try:
        manifest = json.loads(raw, parse_constant=_refuse_constant)
        canonical = (
            isinstance(manifest, dict) and _depth(manifest) <= _MAX_MANIFEST_DEPTH and _canonical(manifest) == raw
        )
    except (ValueError, UnicodeError, RecursionError) as exc:
        raise ArtefactError(f"{origin}: manifest.json is not valid JSON ({_reason(exc)})") from None
    if not canonical:
        raise ArtefactError(
            f"{origin}: manifest.json is not a canonical JSON object (sorted keys, no spaces, nested at most "
            f"{_MAX_MANIFEST_DEPTH} deep)"
        )
    if manifest.get("format") != FORMAT_NAME:
        raise ArtefactError(f"{origin}: manifest field 'format' is not {FORMAT_NAME!r}")
    _check_version(str(manifest.get("format_version", "")), origin)
    _check_array_list(manifest.get("arrays"), origin)
    return manifest


def _refuse_constant(name: str) -> float:
    raise ValueError(f"{name} is not a JSON number")


def _depth(value: object) -> int:
    """How deeply lists and objects nest in a JSON value (iteratively, so that depth cannot overflow)."""
    deepest, pending = 0, [(value, 1)]
    while pending:
        item, level = pending.pop()
        children = item.values() if isinstance(item, dict) else item if isinstance(item, list) else ()
        deepest = max(deepest, level)
        pending.extend((child, level + 1) for child in children if isinstance(child, dict | list))
    return deepest


def _check_array_list(arrays: object, origin: str) -> None:
    """manifest["arrays"] maps plain names to shapes of non-negative integers."""
    if not isinstance(arrays, dict):
        raise ArtefactError(f"{origin}: manifest field 'arrays' is missing")
    for name, shape in arrays.items():
        if not _ARRAY_NAME.fullmatch(name):
            raise ArtefactError(f"{origin}: manifest field 'arrays' names {name[:70]!r}, not an array name")
        if not isinstance(shape, list) or not all(type(n) is int and n >= 0 for n in shape):
            raise ArtefactError(f"{origin}: manifest field 'arrays.{name}' is {shape!r:.70}, not a shape")


def _check_version(version: str, origin: str) -> None:
    try:
        major = int(version.split(".")[0])
    except ValueError:
        raise ArtefactError(f"{origin}: manifest field 'format_version' is {version!r:.70}, not major.minor") from None
    supported = int(FORMAT_VERSION.split(".")[0])
    if major > supported:
        raise ArtefactError(
            f"{origin}: format_version {version} is newer than this runtime reads ({FORMAT_VERSION}); "
            "upgrade policyc where the rule is loaded"
        )
    if major < supported:
        raise ArtefactError(f"{origin}: format_version {version} is older than {FORMAT_VERSION}; recompile the policy")


def _read_array(blob: bytes, name: str, shape: list[int], origin: str) -> np.ndarray:
    """The .npy bytes as a read-only float64 array, after checking that its header declares the manifest's
    shape and exactly as many bytes as follow it (nothing is allocated on the header's word alone)."""
    stream = io.BytesIO(blob)
    try:
        version = np.lib.format.read_magic(stream)
        declared, fortran_order, dtype = np.lib.format.read_array_header_1_0(stream)
    except Exception as exc:  # a damaged .npy header fails in numpy's parser with varying types
        raise ArtefactError(f"{origin}: array {name!r} is not a valid .npy ({_reason(exc)})") from None
    if version != (1, 0) or fortran_order or dtype != np.dtype("<f8"):
        raise ArtefactError(f"{origin}: array {name!r} is not a C-ordered little-endian float64 .npy of format 1.0")
    if list(declared) != shape:
        raise ArtefactError(f"{origin}: array {name!r} has shape {declared}, manifest says {shape}")
    if len(blob) - stream.tell() != 8 * math.prod(shape):
        raise ArtefactError(f"{origin}: array {name!r} holds {len(blob) - stream.tell()} bytes for shape {declared}")
    array = np.frombuffer(blob, dtype="<f8", offset=stream.tell()).reshape(declared)
    array.setflags(write=False)
    return array


def _reason(exc: BaseException) -> str:
    text = str(exc)
    return f"{type(exc).__name__}: {text[:200]}" if text else type(exc).__name__
