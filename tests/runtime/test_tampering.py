"""A rule file changed in any way after it was compiled is refused with an ArtefactError, never loaded and
never answered with another exception type.

The writer is deterministic, so the runtime accepts exactly the canonical encoding of a file's content;
these tests change the demo artefact byte by byte, truncate it, wrap it in junk, reorder and swap its
members and edit its manifest with the ZIP CRC fixed. The figures appear in the terminal summary.
"""

from __future__ import annotations

import io
import json
import os
import struct
import threading
import zipfile
import zlib
from collections import Counter
from collections.abc import Callable, Iterable, Mapping
from pathlib import Path
from typing import Any

import numpy as np
import pytest
from helpers import PACKHOUSE, gaussian_rule, random_spd
from hypothesis import given, settings
from hypothesis import strategies as st

from policyc.compiler.artefact import artefact_bytes
from policyc.compiler.build import compile_policy
from policyc.runtime import ArtefactError, Rule, load_rule, rule_from_bytes
from policyc.runtime import artefact as artefact_format
from policyc.runtime.artefact import content_hash, encode_rule, pack_members

Record = Callable[[str, Mapping[str, int]], None]


@pytest.fixture(scope="module")
def demo() -> bytes:
    return artefact_bytes(compile_policy(PACKHOUSE).rule)


@pytest.fixture(scope="module")
def larger() -> bytes:
    """A Gaussian rule with 6 classes of 30 features: about 50 KB, most of it the stacked whitening matrices."""
    rng = np.random.default_rng(11)
    n_classes, d = 6, 30
    means = rng.normal(0.0, 2.0, (n_classes, d))
    covariances = np.array([random_spd(rng, d) for _ in range(n_classes)])
    loss = rng.uniform(0.0, 5.0, (n_classes, n_classes))
    return artefact_bytes(gaussian_rule(means, covariances, np.full(n_classes, 1 / n_classes), loss, reject_cost=1.0))


def members(data: bytes) -> dict[str, bytes]:
    with zipfile.ZipFile(io.BytesIO(data)) as archive:
        return {name: archive.read(name) for name in archive.namelist()}


def outcome(data: bytes) -> str:
    """ "refused" (ArtefactError), "loaded", or the name of any other exception type."""
    try:
        rule_from_bytes(data)
    except ArtefactError:
        return "refused"
    except Exception as exc:  # the point of the test: any other type is a finding, named in the failure
        return type(exc).__name__
    return "loaded"


def tally(variants: Iterable[bytes]) -> Counter[str]:
    return Counter(outcome(variant) for variant in variants)


def byte_changes(data: bytes, positions: Iterable[int], values: Callable[[int], Iterable[int]]) -> Iterable[bytes]:
    """``data`` with one byte changed: at each position, to each new value ``values(old)`` gives."""
    for position in positions:
        for value in values(data[position]):
            changed = bytearray(data)
            changed[position] = value
            yield bytes(changed)


def flips(old: int) -> list[int]:
    """The lowest bit, the highest bit, and every bit of the byte flipped."""
    return [old ^ 0x01, old ^ 0x80, old ^ 0xFF]


def every_other_value(old: int) -> list[int]:
    return [value for value in range(256) if value != old]


def end_of_central_directory(data: bytes) -> range:
    start = data.rindex(b"PK\x05\x06")
    return range(start, len(data))


def assert_all_refused(counts: Counter[str], total: int) -> None:
    assert sum(counts.values()) == total
    assert counts == Counter({"refused": total}), counts


def test_the_untouched_files_load(demo: bytes, larger: bytes) -> None:
    assert outcome(demo) == "loaded" and outcome(larger) == "loaded"


def test_every_single_byte_change_of_the_demo_artefact_is_refused(demo: bytes, record_figures: Record) -> None:
    counts = tally(byte_changes(demo, range(len(demo)), flips))
    # the end-of-central-directory record (sizes, offsets, counts, comment length) with every byte value
    eocd = end_of_central_directory(demo)
    counts += tally(byte_changes(demo, eocd, every_other_value))
    total = 3 * len(demo) + 255 * len(eocd)
    assert_all_refused(counts, total)
    record_figures(
        f"tampering, demo packhouse artefact ({len(demo)} bytes), single-byte changes",
        {"tried": total, "refused": counts["refused"], "loaded": counts["loaded"], "other exceptions": 0},
    )


def test_single_byte_changes_spread_over_a_larger_artefact_are_refused(larger: bytes, record_figures: Record) -> None:
    positions = np.unique(np.linspace(0, len(larger) - 1, 2_500).astype(int))
    assert positions.size >= 2_000
    counts = tally(byte_changes(larger, positions.tolist(), lambda old: [old ^ 0x01, old ^ 0xFF]))
    assert_all_refused(counts, 2 * positions.size)
    record_figures(
        f"tampering, larger artefact ({len(larger)} bytes), single-byte changes at {positions.size} positions",
        {"tried": 2 * positions.size, "refused": counts["refused"], "loaded": counts["loaded"]},
    )


def test_truncations_and_junk_around_the_archive_are_refused(
    demo: bytes, larger: bytes, record_figures: Record
) -> None:
    truncated = [demo[:length] for length in range(len(demo))]
    truncated += [larger[:length] for length in np.linspace(0, len(larger) - 1, 300).astype(int).tolist()]
    junk = [b"\x00", b"\n", b"PK\x05\x06", bytes(range(256)), demo]
    wrapped = [data + extra for data in (demo, larger) for extra in junk]
    wrapped += [extra + data for data in (demo, larger) for extra in junk]
    counts = tally(truncated + wrapped)
    assert_all_refused(counts, len(truncated) + len(wrapped))
    record_figures(
        "tampering, truncations and junk appended or prepended",
        {"tried": len(truncated) + len(wrapped), "refused": counts["refused"], "loaded": counts["loaded"]},
    )


@settings(max_examples=400, deadline=None)
@given(
    edits=st.lists(
        st.tuples(st.floats(0.0, 1.0), st.integers(0, 64), st.binary(max_size=64)),  # where, cut, insert
        min_size=1,
        max_size=4,
    )
)
def test_random_splices_are_refused(demo: bytes, edits: list[tuple[float, int, bytes]]) -> None:
    """Any mix of cuts and insertions anywhere (several bytes at once, lengths changed) is refused."""
    data = demo
    for where, cut, insert in edits:
        start = int(where * len(data))
        data = data[:start] + insert + data[start + cut :]
    assert outcome(data) == ("loaded" if data == demo else "refused")


def reordered(data: bytes) -> bytes:
    return pack_members(dict(reversed(list(members(data).items()))))


def swapped_arrays(data: bytes) -> bytes:
    """The bytes of two arrays of equal shape exchanged (log_priors and log_normalisers, both (K,))."""
    contents = members(data)
    first, second = "arrays/log_priors.npy", "arrays/log_normalisers.npy"
    contents[first], contents[second] = contents[second], contents[first]
    return pack_members(contents)


def extra_member(data: bytes) -> bytes:
    return pack_members(members(data) | {"arrays/extra.npy": members(data)["arrays/loss.npy"]})


def dropped_member(data: bytes) -> bytes:
    contents = members(data)
    del contents["arrays/centre.npy"]
    return pack_members(contents)


def manifest_twice(data: bytes) -> bytes:
    """Two manifest.json entries: ZIP readers differ on which one counts."""
    buffer = io.BytesIO()
    with zipfile.ZipFile(buffer, "w") as archive, pytest.warns(UserWarning, match="Duplicate name"):
        for name, blob in [*members(data).items(), ("manifest.json", members(data)["manifest.json"])]:
            archive.writestr(zipfile.ZipInfo(name, date_time=(1980, 1, 1, 0, 0, 0)), blob)
    return buffer.getvalue()


def compressed(data: bytes) -> bytes:
    buffer = io.BytesIO()
    with zipfile.ZipFile(buffer, "w", compression=zipfile.ZIP_DEFLATED) as archive:
        for name, blob in members(data).items():
            archive.writestr(zipfile.ZipInfo(name, date_time=(1980, 1, 1, 0, 0, 0)), blob, zipfile.ZIP_DEFLATED)
    return buffer.getvalue()


def test_member_swaps_and_rearrangements_are_refused(demo: bytes, record_figures: Record) -> None:
    variants = {
        "members in another order": (reordered, "not the canonical encoding"),
        "two arrays' bytes exchanged": (swapped_arrays, "content hash mismatch"),
        "an extra member": (extra_member, "not the canonical encoding"),
        "a member dropped": (dropped_member, r"arrays/centre\.npy' is missing"),
        "manifest.json twice": (manifest_twice, "not the canonical encoding"),
        "members deflated": (compressed, "compressed or encrypted"),
    }
    for title, (change, message) in variants.items():
        with pytest.raises(ArtefactError, match=message):
            rule_from_bytes(change(demo))
        assert title
    record_figures("tampering, member swaps and rearrangements", {"tried": len(variants), "refused": len(variants)})


def with_member_replaced(data: bytes, member: str, blob: bytes) -> bytes:
    """``data`` with a member's bytes replaced in place (same length) and its CRC-32 fixed in both headers."""
    assert len(blob) == len(members(data)[member])
    with zipfile.ZipFile(io.BytesIO(data)) as archive:
        info = archive.getinfo(member)
    changed = bytearray(data)
    start = info.header_offset + 30 + len(info.filename.encode()) + len(info.extra)
    changed[start : start + len(blob)] = blob
    crc = struct.pack("<I", zlib.crc32(blob))
    changed[info.header_offset + 14 : info.header_offset + 18] = crc  # local file header
    for offset in _central_entries(data):
        name_length = struct.unpack_from("<H", data, offset + 28)[0]
        if data[offset + 46 : offset + 46 + name_length].decode() == member:
            changed[offset + 16 : offset + 20] = crc  # central directory entry
    return bytes(changed)


def _central_entries(data: bytes) -> list[int]:
    offsets, position = [], data.find(b"PK\x01\x02")
    while position >= 0:
        offsets.append(position)
        position = data.find(b"PK\x01\x02", position + 1)
    return offsets


MANIFEST_EDITS = {
    "revision": ('"revision":3', '"revision":4'),
    "a class renamed": ('"defect"', '"Defect"'),
    "invalid input": ('"invalid_input":"reject"', '"invalid_input":"error!"'),
    "format version": ('"format_version":"1.0"', '"format_version":"1.1"'),
}


@pytest.mark.parametrize("edit", MANIFEST_EDITS)
def test_manifest_edits_with_the_crc_fixed_are_refused(edit: str, demo: bytes) -> None:
    manifest = members(demo)["manifest.json"]
    old, new = MANIFEST_EDITS[edit]
    assert manifest.count(old.encode()) >= 1, "the demo manifest changed shape"
    tampered = with_member_replaced(demo, "manifest.json", manifest.replace(old.encode(), new.encode()))
    with zipfile.ZipFile(io.BytesIO(tampered)) as archive:
        assert archive.testzip() is None  # the ZIP itself is sound: only the content hash can tell
    with pytest.raises(ArtefactError, match="content hash mismatch"):
        rule_from_bytes(tampered)


def rebuilt(data: bytes, change: Callable[[dict[str, Any]], None], respell: Callable[[dict[str, Any]], bytes]) -> bytes:
    """The artefact with its manifest changed, the content hash recomputed, written as ``respell`` spells it."""
    contents = members(data)
    manifest = json.loads(contents["manifest.json"])
    change(manifest)
    blobs = {name: contents[f"arrays/{name}.npy"] for name in manifest["arrays"]}
    manifest["content_sha256"] = content_hash(manifest, blobs)
    return pack_members(contents | {"manifest.json": respell(manifest)})


def canonical(manifest: dict[str, Any]) -> bytes:
    return json.dumps(manifest, sort_keys=True, separators=(",", ":"), ensure_ascii=False).encode()


def nested(depth: int) -> Callable[[dict[str, Any]], None]:
    def change(manifest: dict[str, Any]) -> None:
        value: Any = 0
        for _ in range(depth):
            value = [value]
        manifest["notes"] = value

    return change


def test_a_manifest_that_is_not_canonical_json_is_refused(demo: bytes) -> None:
    unchanged: Callable[[dict[str, Any]], None] = lambda manifest: None  # noqa: E731
    spaced = rebuilt(demo, unchanged, lambda m: json.dumps(m, sort_keys=True).encode())
    with pytest.raises(ArtefactError, match="not a canonical JSON object"):
        rule_from_bytes(spaced)
    manifest = members(demo)["manifest.json"]
    not_a_number = pack_members(members(demo) | {"manifest.json": manifest.replace(b'"revision":3', b'"revision":NaN')})
    with pytest.raises(ArtefactError, match=r"manifest\.json is not valid JSON \(ValueError: NaN"):
        rule_from_bytes(not_a_number)
    too_deep = rebuilt(demo, nested(40), canonical)
    with pytest.raises(ArtefactError, match=r"not a canonical JSON object \(.*nested at most 32 deep\)"):
        rule_from_bytes(too_deep)
    recursion = pack_members(members(demo) | {"manifest.json": _deep_text(members(demo)["manifest.json"], 100_000)})
    with pytest.raises(ArtefactError, match=r"manifest\.json is not valid JSON \(RecursionError"):
        rule_from_bytes(recursion)
    not_an_object = pack_members(members(demo) | {"manifest.json": b"[1,2,3]"})
    with pytest.raises(ArtefactError, match="not a canonical JSON object"):
        rule_from_bytes(not_an_object)


def _deep_text(manifest: bytes, depth: int) -> bytes:
    """The manifest with a value nested deeper than json.loads can recurse (json.dumps could not write it)."""
    return manifest[:-1] + b',"zz":' + b"[" * depth + b"0" + b"]" * depth + b"}"


def test_a_recomputed_hash_makes_an_edit_load_the_hash_is_no_signature(demo: bytes) -> None:
    # The content hash detects damage; whoever can write the file can recompute it. Pin the file's sha256
    # where it is deployed (README, "Pinning a rule").
    edited = rebuilt(demo, lambda m: m.update(revision=99), canonical)
    assert rule_from_bytes(edited).manifest["revision"] == 99


# --- finding 8: non-finite parameters are refused even with a valid hash ----------------------------------


@pytest.mark.parametrize(
    ("array", "value"),
    [("loss", np.nan), ("loss", np.inf), ("whitening", np.nan), ("centre", -np.inf), ("log_priors", np.nan)],
)
def test_non_finite_arrays_are_refused_even_with_a_recomputed_hash(
    array: str, value: float, demo: bytes, tmp_path: Path
) -> None:
    rule = rule_from_bytes(demo)
    params = dict(rule.params)
    params[array] = params[array].copy()
    params[array].flat[1] = value
    unsigned = {k: v for k, v in rule.manifest.items() if k not in ("arrays", "content_sha256")}
    forged = tmp_path / "forged.rule"
    forged.write_bytes(encode_rule(unsigned, params))
    with pytest.raises(ArtefactError, match=rf"array '{array}' holds NaN or infinite values"):
        load_rule(forged)


def test_a_prior_of_zero_is_minus_infinity_and_loads(demo: bytes) -> None:
    rule = rule_from_bytes(demo)
    zero_prior = Rule(rule.manifest, dict(rule.params) | {"log_priors": np.log([0.6, 0.4, 1.0]) - [0, 0, np.inf]})
    assert zero_prior.params["log_priors"][2] == -np.inf
    assert zero_prior.decide(np.array([[40.0, 0.5, 150.0, 12.0]])).shape == (1,)
    with pytest.raises(ArtefactError, match="every class a prior of zero"):
        Rule(rule.manifest, dict(rule.params) | {"log_priors": np.full(3, -np.inf)})


# --- finding 11: what zipfile, json and numpy raise on hostile bytes is an ArtefactError -------------------


def test_size_caps_are_checked_before_reading(demo: bytes, monkeypatch: pytest.MonkeyPatch) -> None:
    huge_manifest = pack_members(members(demo) | {"manifest.json": b" " * (artefact_format.MAX_MANIFEST_BYTES + 1)})
    with pytest.raises(ArtefactError, match=r"'manifest\.json' declares 16777217 bytes, more than 16777216"):
        rule_from_bytes(huge_manifest)
    monkeypatch.setattr(artefact_format, "MAX_RULE_BYTES", len(demo) - 1)
    with pytest.raises(ArtefactError, match="larger than a rule file may be"):
        rule_from_bytes(demo)


def test_an_array_header_claiming_more_than_it_holds_is_refused_before_allocating(demo: bytes) -> None:
    # A writer who recomputes the hash can declare any shape: 10**12 x 3 float64 would be 24 TB.
    contents = members(demo)
    header = io.BytesIO()
    np.lib.format.write_array_header_1_0(header, {"descr": "<f8", "fortran_order": False, "shape": (10**12, 3)})
    loss = contents["arrays/loss.npy"]
    data_start = len(loss) - 8 * rule_from_bytes(demo).params["loss"].size
    contents["arrays/loss.npy"] = header.getvalue() + loss[data_start:]
    manifest = json.loads(contents["manifest.json"])
    manifest["arrays"]["loss"] = [10**12, 3]
    blobs = {name: contents[f"arrays/{name}.npy"] for name in manifest["arrays"]}
    manifest["content_sha256"] = content_hash(manifest, blobs)
    forged = pack_members(contents | {"manifest.json": canonical(manifest)})
    with pytest.raises(ArtefactError, match=r"array 'loss' holds 96 bytes for shape \(1000000000000, 3\)"):
        rule_from_bytes(forged)


def test_a_compressed_bomb_is_refused_without_inflating(demo: bytes) -> None:
    buffer = io.BytesIO()
    with zipfile.ZipFile(buffer, "w", compression=zipfile.ZIP_DEFLATED) as archive:
        archive.writestr("manifest.json", b" " * (64 << 20))  # 64 MiB of spaces in about 64 KB
    assert len(buffer.getvalue()) < 1 << 20
    with pytest.raises(ArtefactError, match="compressed or encrypted"):
        rule_from_bytes(buffer.getvalue())


def test_files_that_are_not_regular_are_refused_without_reading(tmp_path: Path) -> None:
    with pytest.raises(ArtefactError, match="not a regular file"):
        load_rule("/dev/zero")
    with pytest.raises(ArtefactError, match="not a regular file"):
        load_rule(tmp_path)
    fifo = tmp_path / "rule.fifo"
    os.mkfifo(fifo)
    result: list[str] = []
    reader = threading.Thread(target=lambda: result.append(outcome_of_load(fifo)), daemon=True)
    reader.start()
    reader.join(timeout=10)
    assert result == ["not a regular file"], "loading a FIFO hung or was not refused"


def outcome_of_load(path: Path) -> str:
    try:
        load_rule(path)
    except ArtefactError as exc:
        return str(exc).split(": ", 1)[1]
    return "loaded"
