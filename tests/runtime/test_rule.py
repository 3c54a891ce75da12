"""The numpy-only runtime: artefact verification, the decision API, input validation, numerics."""

from __future__ import annotations

import contextlib
import errno
import io
import json
import os
import re
import subprocess
import sys
import zipfile
from pathlib import Path
from typing import Any

import numpy as np
import pytest
import scipy.special
import scipy.stats
from helpers import (
    DEMOS,
    PACKHOUSE,
    gaussian_rule,
    policy_text,
    posterior_evidence,
    random_spd,
    read_csv_columns,
    rule_from_text,
    two_class_text,
)

from policyc.compiler import write_artefact
from policyc.compiler.build import compile_policy
from policyc.runtime import FORMAT_VERSION, ArtefactError, InputError, Rule, load_rule
from policyc.runtime import artefact as artefact_module
from policyc.runtime import rule as rule_module
from policyc.runtime.artefact import content_hash, pack_members

# --- fixtures and artefact surgery ------------------------------------------------------------------


@pytest.fixture(scope="module")
def packhouse_file(tmp_path_factory: pytest.TempPathFactory) -> Path:
    path = tmp_path_factory.mktemp("rules") / "packhouse.rule"
    write_artefact(compile_policy(PACKHOUSE).rule, path)
    return path


@pytest.fixture(scope="module")
def packhouse(packhouse_file: Path) -> Rule:
    return load_rule(packhouse_file)


@pytest.fixture(scope="module")
def incoming(packhouse: Rule) -> np.ndarray:
    return read_csv_columns(DEMOS / "packhouse" / "incoming.csv", packhouse.features)


def members(data: bytes) -> dict[str, bytes]:
    with zipfile.ZipFile(io.BytesIO(data)) as archive:
        return {name: archive.read(name) for name in archive.namelist()}


def rezip(contents: dict[str, bytes]) -> bytes:
    """A fresh ZIP holding ``contents``, packed exactly as the writer packs (valid CRCs, canonical headers)."""
    return pack_members(contents)


def canonical(manifest: dict[str, Any]) -> bytes:
    return json.dumps(manifest, sort_keys=True, separators=(",", ":"), ensure_ascii=False).encode()


def rewrite(path: Path, target: Path, change_manifest: Any = None, drop: str | None = None) -> Path:
    """Copy a rule file, editing its manifest and re-hashing it so that only the edit can fail."""
    contents = members(path.read_bytes())
    manifest = json.loads(contents["manifest.json"])
    if change_manifest is not None:
        change_manifest(manifest)
    if drop is not None:
        del contents[f"arrays/{drop}.npy"]
    blobs = {
        name: contents[f"arrays/{name}.npy"] for name in manifest.get("arrays", {}) if f"arrays/{name}.npy" in contents
    }
    manifest["content_sha256"] = content_hash(manifest, blobs)
    contents["manifest.json"] = canonical(manifest)
    target.write_bytes(rezip(contents))
    return target


# --- artefact verification ---------------------------------------------------------------------------


def test_load_rule_round_trips_the_compiled_rule(packhouse_file: Path) -> None:
    compiled = compile_policy(PACKHOUSE).rule
    loaded = load_rule(packhouse_file)
    assert dict(loaded.manifest) == dict(compiled.manifest)
    assert set(loaded.params) == set(compiled.params)
    for name in compiled.params:
        assert np.array_equal(loaded.params[name], compiled.params[name]), name
    assert loaded.classes == ("premium", "standard", "defect")
    assert loaded.actions == ("pack_premium", "pack_standard", "juice", "hold_for_inspector")
    assert loaded.features == ("firmness_n", "blush_frac", "mass_g", "brix")


def test_tampered_array_fails_the_content_hash(packhouse_file: Path, tmp_path: Path) -> None:
    contents = members(packhouse_file.read_bytes())
    blob = bytearray(contents["arrays/loss.npy"])
    blob[-1] ^= 0x01  # last byte of the last float64 of the loss matrix
    contents["arrays/loss.npy"] = bytes(blob)
    tampered = tmp_path / "tampered.rule"
    tampered.write_bytes(rezip(contents))
    with pytest.raises(ArtefactError, match="content hash mismatch"):
        load_rule(tampered)


def test_flipped_byte_in_the_file_is_refused(packhouse_file: Path, tmp_path: Path) -> None:
    data = bytearray(packhouse_file.read_bytes())
    with zipfile.ZipFile(packhouse_file) as archive:
        info = archive.getinfo("arrays/loss.npy")
    # local header: 30 bytes + name + extra, then the stored .npy bytes; flip inside the array data
    start = info.header_offset + 30 + len(info.filename.encode()) + len(info.extra)
    data[start + info.compress_size - 3] ^= 0x10
    flipped = tmp_path / "flipped.rule"
    flipped.write_bytes(bytes(data))
    # The ZIP CRC notices first ("corrupt"); either way the rule is refused, naming the member or the hash.
    with pytest.raises(ArtefactError, match=r"loss\.npy.*corrupt|content hash"):
        load_rule(flipped)


def test_newer_major_format_version_is_refused_by_name(packhouse_file: Path, tmp_path: Path) -> None:
    newer = rewrite(packhouse_file, tmp_path / "v2.rule", lambda m: m.update(format_version="2.0"))
    with pytest.raises(ArtefactError, match=r"format_version 2\.0 is newer") as info:
        load_rule(newer)
    assert FORMAT_VERSION in str(info.value)
    assert "hash" not in str(info.value)


def test_newer_minor_format_version_is_accepted(packhouse_file: Path, tmp_path: Path) -> None:
    major = FORMAT_VERSION.split(".")[0]
    newer_minor = rewrite(packhouse_file, tmp_path / "minor.rule", lambda m: m.update(format_version=f"{major}.9"))
    assert load_rule(newer_minor).manifest["format_version"] == f"{major}.9"


def test_older_major_and_malformed_versions_are_refused(packhouse_file: Path, tmp_path: Path) -> None:
    older = rewrite(packhouse_file, tmp_path / "v0.rule", lambda m: m.update(format_version="0.3"))
    with pytest.raises(ArtefactError, match=r"format_version 0\.3 is older"):
        load_rule(older)
    garbled = rewrite(packhouse_file, tmp_path / "vx.rule", lambda m: m.update(format_version="one"))
    with pytest.raises(ArtefactError, match="format_version"):
        load_rule(garbled)


def test_wrong_format_name_is_refused(packhouse_file: Path, tmp_path: Path) -> None:
    other = rewrite(packhouse_file, tmp_path / "other.rule", lambda m: m.update(format="some-other-format"))
    with pytest.raises(ArtefactError, match="'format'"):
        load_rule(other)


def test_missing_array_member_is_refused(packhouse_file: Path, tmp_path: Path) -> None:
    missing = rewrite(packhouse_file, tmp_path / "missing.rule", drop="whitening")
    with pytest.raises(ArtefactError, match=r"arrays/whitening\.npy.*missing"):
        load_rule(missing)


def test_array_absent_from_manifest_and_file_is_refused(packhouse_file: Path, tmp_path: Path) -> None:
    def forget(manifest: dict[str, Any]) -> None:
        del manifest["arrays"]["log_priors"]

    missing = rewrite(packhouse_file, tmp_path / "forgot.rule", forget, drop="log_priors")
    with pytest.raises(ArtefactError, match=r"log_priors.*missing"):
        load_rule(missing)


def test_shape_disagreeing_with_manifest_is_refused(packhouse_file: Path, tmp_path: Path) -> None:
    bad = rewrite(packhouse_file, tmp_path / "shape.rule", lambda m: m["arrays"].update(loss=[3, 3]))
    with pytest.raises(ArtefactError, match="'loss' has shape"):
        load_rule(bad)


def test_shape_disagreeing_with_classes_is_refused(packhouse_file: Path, tmp_path: Path) -> None:
    def drop_class(manifest: dict[str, Any]) -> None:
        manifest["classes"] = manifest["classes"][:2]

    bad = rewrite(packhouse_file, tmp_path / "classes.rule", drop_class)
    with pytest.raises(ArtefactError, match="'log_priors' has shape"):
        load_rule(bad)


def test_unreadable_and_non_archive_files_are_refused(tmp_path: Path) -> None:
    with pytest.raises(ArtefactError, match="cannot read"):
        load_rule(tmp_path / "absent.rule")
    junk = tmp_path / "junk.rule"
    junk.write_bytes(b"policy: not a rule\n")
    with pytest.raises(ArtefactError, match="not a readable ZIP"):
        load_rule(junk)


def test_a_file_larger_than_the_cap_is_refused_by_its_size(
    packhouse_file: Path, monkeypatch: pytest.MonkeyPatch
) -> None:
    # load_rule reads one byte beyond the cap, so the decoder sees that the file is too large, not a cut archive
    size = packhouse_file.stat().st_size
    monkeypatch.setattr(rule_module, "MAX_RULE_BYTES", size - 1)
    monkeypatch.setattr(artefact_module, "MAX_RULE_BYTES", size - 1)
    with pytest.raises(ArtefactError, match=f"{size} bytes is larger than a rule file may be"):
        load_rule(packhouse_file)


def test_a_file_that_cannot_be_opened_or_read_is_refused_with_the_system_message(
    packhouse_file: Path, tmp_path: Path, monkeypatch: pytest.MonkeyPatch
) -> None:
    with pytest.raises(ArtefactError, match=r"absent\.rule: cannot read: No such file or directory$"):
        load_rule(tmp_path / "absent.rule")

    class FailingDisk(io.RawIOBase):
        def read(self, size: int = -1) -> bytes:
            raise OSError(errno.EIO, "Input/output error")

    monkeypatch.setattr(os, "fdopen", lambda *args, **kwargs: contextlib.nullcontext(FailingDisk()))
    with pytest.raises(ArtefactError, match=r"packhouse\.rule: cannot read: Input/output error$"):
        load_rule(packhouse_file)


# --- the decision API ----------------------------------------------------------------------------------


def test_shapes_and_consistency_of_the_api(packhouse: Rule, incoming: np.ndarray) -> None:
    n, n_classes, n_actions = incoming.shape[0], len(packhouse.classes), len(packhouse.actions)
    decisions = packhouse.decide(incoming)
    posteriors = packhouse.posteriors(incoming)
    risks = packhouse.risks(incoming)
    assert decisions.shape == (n,) and decisions.dtype.kind == "i"
    assert posteriors.shape == (n, n_classes)
    assert risks.shape == (n, n_actions)
    assert np.allclose(posteriors.sum(axis=1), 1.0, rtol=0, atol=1e-12)
    assert ((posteriors >= 0) & (posteriors <= 1)).all()
    # R(a|x) = Σ_k λ(a|k) P(k|x) (Fukunaga 1990 eq. 3.19, references.md LR-1); reject row constant d
    assert np.allclose(risks, posteriors @ packhouse.params["loss"].T, rtol=1e-12, atol=1e-12)
    # R(reject|x) = d Σ_k P(k|x) = d up to the rounding of the posterior sum
    assert np.allclose(risks[:, -1], 2.5, rtol=0, atol=1e-12)
    assert np.array_equal(decisions, np.argmin(risks, axis=1))
    names = packhouse.decide_names(incoming)
    assert names.tolist() == [packhouse.actions[i] for i in decisions]
    assert len(set(decisions.tolist())) == n_actions  # the demo data reaches every action, reject included


def test_explain_agrees_with_decide(packhouse: Rule, incoming: np.ndarray) -> None:
    explanation = packhouse.explain(incoming)
    assert np.array_equal(explanation.action, packhouse.decide(incoming))
    assert np.array_equal(explanation.posteriors, packhouse.posteriors(incoming))
    assert np.array_equal(explanation.risks, packhouse.risks(incoming))
    assert explanation.valid.all()
    assert (explanation.margin >= 0).all()
    assert (explanation.runner_up != explanation.action).all()
    rows = np.arange(incoming.shape[0])
    sorted_risks = np.sort(explanation.risks, axis=1)
    assert np.array_equal(explanation.risks[rows, explanation.runner_up], sorted_risks[:, 1])
    assert np.allclose(explanation.margin, sorted_risks[:, 1] - sorted_risks[:, 0], rtol=0, atol=1e-12)


def test_decide_one_by_feature_name(packhouse: Rule, incoming: np.ndarray) -> None:
    for row in incoming[:20]:
        record = dict(zip(packhouse.features, row.tolist(), strict=True))
        shuffled = dict(reversed(list(record.items())))  # order of the mapping does not matter
        assert packhouse.decide_one(shuffled) == packhouse.decide_names(row[None, :])[0]
    record = dict(zip(packhouse.features, incoming[0].tolist(), strict=True))
    with pytest.raises(InputError, match="missing feature"):
        packhouse.decide_one({k: v for k, v in record.items() if k != "brix"})
    with pytest.raises(InputError, match="unknown field"):
        packhouse.decide_one(record | {"colour": 1.0})
    with pytest.raises(InputError, match="must be a number"):
        packhouse.decide_one(record | {"brix": "15"})
    with pytest.raises(InputError, match="must be a number"):
        packhouse.decide_one(record | {"brix": True})


def test_float32_input_matches_float64(packhouse: Rule, incoming: np.ndarray) -> None:
    single = incoming.astype(np.float32)
    # Rounding the inputs to float32 moves them by ~1e-7 relative: decisions may only differ where
    # the float64 margin is that small (none in the demo data), posteriors by < 1e-6.
    clear = packhouse.explain(incoming).margin > 1e-4
    assert clear.mean() > 0.95
    assert np.array_equal(packhouse.decide(single)[clear], packhouse.decide(incoming)[clear])
    assert np.abs(packhouse.posteriors(single) - packhouse.posteriors(incoming)).max() < 1e-6
    # The float32 values themselves, widened exactly, give identical results.
    assert np.array_equal(packhouse.posteriors(single), packhouse.posteriors(single.astype(np.float64)))


@pytest.mark.parametrize(
    ("array", "message"),
    [
        (np.zeros((3, 3)), "expected 4 feature columns, got 3"),
        (np.zeros((3, 5)), "expected 4 feature columns, got 5"),
        (np.array([["a", "b", "c", "d"]]), "numeric"),
        (np.array([[1.0, "2.0", 2.0, 3.0]], dtype=object), r"row 0, column 1 must be a number, got str '2\.0'"),
        (np.zeros((3, 4), dtype=bool), "booleans"),
        (np.zeros((3, 4), dtype=complex), "numeric"),
        (np.zeros(4), "2-D"),
        (np.zeros((2, 2, 4)), "2-D"),
        (np.zeros((0, 4)), "no rows"),
    ],
    ids=["narrow", "wide", "strings", "object", "bool", "complex", "1-D", "3-D", "empty"],
)
def test_bad_input_raises_input_error(packhouse: Rule, array: np.ndarray, message: str) -> None:
    for method in (packhouse.decide, packhouse.posteriors, packhouse.risks, packhouse.explain):
        with pytest.raises(InputError, match=message):
            method(array)


def test_integer_and_list_input_is_accepted(packhouse: Rule, incoming: np.ndarray) -> None:
    rounded = np.round(incoming[:10]).astype(np.int64)
    assert np.array_equal(packhouse.decide(rounded), packhouse.decide(rounded.astype(float)))
    assert np.array_equal(packhouse.decide(incoming[:10].tolist()), packhouse.decide(incoming[:10]))


def test_invalid_rows_are_rejected_under_invalid_input_reject(packhouse: Rule, incoming: np.ndarray) -> None:
    X = incoming[:6].copy()
    X[1, 0] = np.nan
    X[3, 2] = np.inf
    X[4, 3] = -np.inf
    explanation = packhouse.explain(X)
    reject = packhouse.actions.index("hold_for_inspector")
    assert packhouse.decide(X)[[1, 3, 4]].tolist() == [reject] * 3
    assert np.array_equal(explanation.valid, [True, False, True, False, False, True])
    assert np.isnan(packhouse.posteriors(X)[[1, 3, 4]]).all()
    assert np.isnan(packhouse.risks(X)[[1, 3, 4]]).all()
    assert np.isnan(explanation.margin[[1, 3, 4]]).all() and (explanation.runner_up[[1, 3, 4]] == -1).all()
    # valid rows are decided as if alone
    good = [0, 2, 5]
    assert np.array_equal(packhouse.decide(X)[good], packhouse.decide(incoming[good]))
    assert np.array_equal(packhouse.posteriors(X)[good], packhouse.posteriors(incoming[good]))


def test_invalid_rows_raise_naming_the_rows_under_invalid_input_error(packhouse: Rule, incoming: np.ndarray) -> None:
    strict = Rule(dict(packhouse.manifest) | {"invalid_input": "error"}, dict(packhouse.params))
    X = incoming[:8].copy()
    X[2, 1] = np.nan
    X[7, 0] = -np.inf
    for method in (strict.decide, strict.decide_names, strict.posteriors, strict.risks, strict.explain):
        with pytest.raises(InputError, match=r"row\(s\) 2, 7 \(0-based\)"):
            method(X)
    assert np.array_equal(strict.decide(incoming[:8]), packhouse.decide(incoming[:8]))


def test_decide_valid_never_raises_and_sends_invalid_rows_to_the_last_action(
    packhouse: Rule, incoming: np.ndarray
) -> None:
    strict = Rule(dict(packhouse.manifest) | {"invalid_input": "error"}, dict(packhouse.params))
    X = incoming[:5].copy()
    X[2, 1] = np.nan
    with pytest.raises(InputError):
        strict.decide(X)
    actions, valid = strict.decide_valid(X)
    assert valid.tolist() == [True, True, False, True, True]
    assert actions[2] == len(strict.actions) - 1
    np.testing.assert_array_equal(actions[valid], packhouse.decide(incoming[[0, 1, 3, 4]]))


def test_log_likelihood_evidence_treats_plus_infinity_as_invalid_and_minus_infinity_as_impossible() -> None:
    rule = rule_from_text(
        two_class_text(
            reject_cost=0.2,
            invalid_input="reject",
        )
    )
    X = np.array([[-np.inf, -3.0], [np.inf, 0.0], [-np.inf, -np.inf], [0.0, np.nan]])
    assert rule.decide(X).tolist() == [1, 2, 2, 2]
    assert rule.posteriors(X)[0].tolist() == [0.0, 1.0]
    assert rule.explain(X).valid.tolist() == [True, False, False, False]


def test_far_field_posteriors_are_finite_and_match_scipy_softmax() -> None:
    rng = np.random.default_rng(7)
    d, n_classes = 3, 3
    means = rng.normal(0.0, 2.0, (n_classes, d))
    covariances = np.array([random_spd(rng, d, 0.5, 2.0) for _ in range(n_classes)])
    priors = np.array([0.2, 0.3, 0.5])
    loss = 1.0 - np.eye(n_classes)
    rule = gaussian_rule(means, covariances, priors, loss, reject_cost=0.3)
    # 50 standard deviations (of the widest class) away from every mean, in random directions
    directions = rng.normal(size=(200, d))
    directions /= np.linalg.norm(directions, axis=1, keepdims=True)
    sigma = np.sqrt(max(np.linalg.eigvalsh(c)[-1] for c in covariances))
    X = means.mean(axis=0) + (50.0 * sigma + np.linalg.norm(means, axis=1).max()) * directions
    log_joint = np.column_stack(
        [scipy.stats.multivariate_normal(means[k], covariances[k]).logpdf(X) for k in range(n_classes)]
    ) + np.log(priors)
    # in linear space every density underflows to 0 and the posterior is 0/0
    assert (np.exp(log_joint).max(axis=1) == 0.0).any()
    posteriors = rule.posteriors(X)
    assert np.isfinite(posteriors).all()
    # Stable posteriors = softmax of the log joint (references.md MV-3)
    expected = scipy.special.softmax(log_joint, axis=1)
    assert np.allclose(posteriors, expected, rtol=1e-9, atol=1e-12)
    assert np.isfinite(rule.risks(X)).all()


def test_rule_arrays_are_read_only(packhouse: Rule) -> None:
    for name, array in packhouse.params.items():
        assert not array.flags.writeable, name
        with pytest.raises(ValueError, match="read-only"):
            array[...] = 0.0
    with pytest.raises(TypeError):
        packhouse.params["loss"] = np.zeros((4, 3))  # type: ignore[index]
    with pytest.raises(TypeError):
        packhouse.manifest["classes"] = []  # type: ignore[index]


def test_rule_copies_the_arrays_it_is_built_from() -> None:
    log_priors = np.log([0.5, 0.5])
    loss = np.array([[0.0, 1.0], [1.0, 0.0]])
    manifest = {
        "classes": ["c0", "c1"],
        "actions": ["a0", "a1"],
        "features": ["l0", "l1"],
        "reject_action": None,
        "evidence": {"kind": "log-likelihood"},
        "invalid_input": "error",
    }
    rule = Rule(manifest, {"log_priors": log_priors, "loss": loss})
    loss[0, 1] = 100.0
    assert rule.params["loss"][0, 1] == 1.0
    assert rule.decide(np.array([[0.0, 1.0]])).tolist() == [1]


def tie_rule(actions: list[str], loss: np.ndarray, reject_cost: float | None = None) -> Rule:
    classes = ["c0", "c1"]
    return rule_from_text(
        policy_text(
            classes=classes,
            priors=[0.5, 0.5],
            actions=actions,
            loss=loss,
            evidence=posterior_evidence(classes, [0.5, 0.5]),
            reject_cost=reject_cost,
        )
    )


def test_exact_ties_break_toward_the_earlier_action() -> None:
    # P = (1/2, 1/2) exactly: ln ½ - ln ½ + ln ½ is the same float in both columns.
    half = np.array([[0.5, 0.5]])
    forward = tie_rule(["left", "right"], np.array([[0.0, 1.0], [1.0, 0.0]]))
    assert forward.posteriors(half).tolist() == [[0.5, 0.5]]
    assert forward.risks(half).tolist() == [[0.5, 0.5]]
    assert forward.decide_names(half).tolist() == ["left"]
    backward = tie_rule(["right", "left"], np.array([[1.0, 0.0], [0.0, 1.0]]))
    assert backward.decide_names(half).tolist() == ["right"]
    explanation = forward.explain(half)
    assert explanation.runner_up.tolist() == [1] and explanation.margin.tolist() == [0.0]


def test_a_tie_with_the_reject_cost_takes_the_action() -> None:
    # min risk == d exactly: Chow accepts on equality (references.md, tie conventions); reject is last.
    rule = tie_rule(["left", "right"], np.array([[0.0, 1.0], [1.0, 0.0]]), reject_cost=0.5)
    half = np.array([[0.5, 0.5]])
    assert rule.risks(half).tolist() == [[0.5, 0.5, 0.5]]
    assert rule.decide_names(half).tolist() == ["left"]
    below = tie_rule(["left", "right"], np.array([[0.0, 1.0], [1.0, 0.0]]), reject_cost=0.4999)
    assert below.decide_names(half).tolist() == ["reject"]


# --- start-up -------------------------------------------------------------------------------------------

SERVICE_START = """
import json, sys
from policyc.runtime import load_rule
rule = load_rule(sys.argv[1])
record = dict.fromkeys(rule.features, 1.0)
first = rule.decide_one(record)
loaded = sorted(name for name in ("decimal", "numpy.typing") if name in sys.modules)
from decimal import Decimal
second = rule.decide_one({name: Decimal("1.0") for name in rule.features})
print(json.dumps({"loaded": loaded, "same": first == second}))
"""


def test_a_service_start_loads_neither_decimal_nor_numpy_typing_yet_reads_decimals_later(packhouse_file: Path) -> None:
    # Each costs start-up milliseconds (tests/benchmarks/bench_all.py); a Decimal can only exist once its module
    # is loaded, and then it is read like the float it stands for.
    result = subprocess.run(
        [sys.executable, "-c", SERVICE_START, str(packhouse_file)], capture_output=True, text=True, check=True
    )
    assert json.loads(result.stdout) == {"loaded": [], "same": True}


# --- a fitted isotonic map's arrays ------------------------------------------------------------------


def isotonic_rule(thresholds: list[float], values: list[float], ends: list[float]) -> Rule:
    """Three classes under equal priors, posterior evidence through per-class isotonic maps m_k: class k's points
    are thresholds[ends[k - 1]:ends[k]] and values likewise."""
    classes = ["c0", "c1", "c2"]
    text = policy_text(
        classes=classes,
        priors=[1 / 3] * 3,
        actions=["a0", "a1", "a2"],
        loss=1.0 - np.eye(3),
        evidence=posterior_evidence(classes, [1 / 3] * 3),
        reject_cost=0.4,
        invalid_input="reject",
    )
    base = rule_from_text(text)
    arrays = {"calibration_thresholds": thresholds, "calibration_values": values, "calibration_ends": ends}
    params = dict(base.params) | {"calibration_floor": np.array(1e-12)} | {k: np.array(v) for k, v in arrays.items()}
    return Rule(base.manifest, params)


# class 0 has a single point (a constant map), classes 1 and 2 two each
THRESHOLDS = [0.5, 0.2, 0.8, 0.3, 0.9]
VALUES = [0.4, 0.0, 1.0, 0.0, 1.0]


def test_an_isotonic_map_interpolates_each_class_on_its_own_points() -> None:
    # docs/math.md §5.2.1 (Zadrozny & Elkan 2002): q_k = m_k(p_k) / Σ_j m_j(p_j), m_k linear between its points
    # and clipped outside. Row (0.2, 0.5, 0.3): m = (0.4, 0.5, 0.0), so q = (4/9, 5/9, 0) (hand-computed).
    rule = isotonic_rule(THRESHOLDS, VALUES, [1.0, 3.0, 5.0])
    np.testing.assert_allclose(rule.posteriors(np.array([[0.2, 0.5, 0.3]])), [[4 / 9, 5 / 9, 0.0]], rtol=1e-14)


@pytest.mark.parametrize(
    ("ends", "why"),
    [
        ([1.5, 3.0, 5.0], "a piece end between two points"),
        ([1.0, 1.0, 5.0], "a class without points"),
        ([0.0, 3.0, 5.0], "the first class without points"),
        ([1.0, 3.0, 4.0], "a point left over"),
        ([1.0, 3.0, 6.0], "more points claimed than there are"),
        ([1.0, 2.0, 3.0, 5.0], "one piece too many"),
        ([1.0, 5.0], "one piece too few"),
    ],
)
def test_isotonic_piece_ends_that_do_not_split_the_points_by_class_are_refused(ends: list[float], why: str) -> None:
    with pytest.raises(ArtefactError, match="does not split the isotonic points by class"):
        isotonic_rule(THRESHOLDS, VALUES, ends)


def test_isotonic_points_that_are_not_a_list_are_refused() -> None:
    with pytest.raises(ArtefactError, match="does not split the isotonic points by class"):
        isotonic_rule([[t] for t in THRESHOLDS], [[v] for v in VALUES], [1.0, 3.0, 5.0])  # type: ignore[misc]


@pytest.mark.parametrize("drop", ["calibration_thresholds", "calibration_values", "calibration_ends"])
def test_an_incomplete_isotonic_map_is_refused(drop: str) -> None:
    rule = isotonic_rule(THRESHOLDS, VALUES, [1.0, 3.0, 5.0])
    params = {k: v for k, v in rule.params.items() if k != drop}
    with pytest.raises(ArtefactError, match="incomplete or of more than one method"):
        Rule(rule.manifest, params)


@pytest.mark.parametrize(
    "other", [{"calibration_inverse_temperature": 0.5}, {"calibration_bias": [0.0, 0.0, 0.0]}], ids=["whole", "part"]
)
def test_an_isotonic_map_beside_another_map_or_part_of_one_is_refused(other: dict[str, Any]) -> None:
    rule = isotonic_rule(THRESHOLDS, VALUES, [1.0, 3.0, 5.0])
    params = dict(rule.params) | {name: np.array(value) for name, value in other.items()}
    with pytest.raises(ArtefactError, match="incomplete or of more than one method"):
        Rule(rule.manifest, params)


# --- what a Rule refuses to be built from ------------------------------------------------------------


def small_rule(**overrides: Any) -> Rule:
    """Two classes on log-likelihood columns, 0-1 loss, reject at 0.2."""
    return rule_from_text(two_class_text(reject_cost=0.2, invalid_input="reject", **overrides))


MANIFEST_REFUSALS = {
    "unknown evidence": ({"evidence": {"kind": "histogram"}}, "'evidence.kind' is 'histogram', unknown here"),
    "evidence not a mapping": ({"evidence": "log-likelihood"}, "'evidence.kind' is None, unknown here"),
    "unknown invalid_input": ({"invalid_input": "skip"}, "field 'invalid_input' is 'skip'"),
    "reject action not last": ({"reject_action": "a0"}, "'reject_action' must name the last action"),
    "reject without a reject action": ({"reject_action": None}, "'invalid_input' is 'reject' but there is no"),
    "classes not a list": ({"classes": "c0"}, "'classes' must be a non-empty list of names"),
    "no classes": ({"classes": []}, "'classes' must be a non-empty list of names"),
    "an empty class name": ({"classes": ["c0", ""]}, "'classes' must be a non-empty list of names"),
    "a class name not text": ({"classes": ["c0", 1]}, "'classes' must be a non-empty list of names"),
    "a repeated action": ({"actions": ["a0", "a0", "reject"]}, "'actions' repeats a name"),
}


@pytest.mark.parametrize("case", MANIFEST_REFUSALS)
def test_a_manifest_that_does_not_describe_its_arrays_is_refused_by_name(case: str) -> None:
    rule = small_rule()
    change, message = MANIFEST_REFUSALS[case]
    with pytest.raises(ArtefactError, match=re.escape(message)):
        Rule(dict(rule.manifest) | change, dict(rule.params))


ARRAY_REFUSALS = {
    "loss missing": ({"loss": None}, "arrays ['loss'] are missing for evidence 'log-likelihood'"),
    "loss of another shape": ({"loss": np.zeros((3, 3))}, "array 'loss' has shape (3, 3), expected (3, 2)"),
    "novelty without Gaussians": ({"novelty_threshold": np.array(4.0)}, "needs gaussian evidence and a reject action"),
    "-inf loss": ({"loss": np.array([[0.0, 1.0], [1.0, 0.0], [0.2, -np.inf]])}, "'loss' holds NaN or infinite"),
    "+inf prior": ({"log_priors": np.array([np.inf, 0.0])}, "'log_priors' holds NaN or infinite"),
    "NaN prior": ({"log_priors": np.array([np.nan, 0.0])}, "'log_priors' holds NaN or infinite"),
}


@pytest.mark.parametrize("case", ARRAY_REFUSALS)
def test_arrays_that_do_not_fit_the_manifest_are_refused_by_name(case: str) -> None:
    rule = small_rule()
    change, message = ARRAY_REFUSALS[case]
    params = {name: array for name, array in (dict(rule.params) | change).items() if array is not None}
    with pytest.raises(ArtefactError, match=re.escape(message)):
        Rule(rule.manifest, params)


def test_a_prior_of_zero_is_allowed_and_its_class_never_chosen() -> None:
    # ln 0 = -inf is the one non-finite value a log-probability array may hold
    rule = small_rule()
    zero = Rule(rule.manifest, dict(rule.params) | {"log_priors": np.array([-np.inf, 0.0])})
    assert zero.posteriors(np.array([[5.0, -5.0]])).tolist() == [[0.0, 1.0]]


@pytest.mark.parametrize(("reject", "threshold"), [(False, np.array(4.0)), (True, np.array([4.0]))])
def test_a_novelty_threshold_needs_a_reject_action_and_one_value(reject: bool, threshold: np.ndarray) -> None:
    rule = gaussian_rule(
        np.array([[0.0], [10.0]]), np.ones((2, 1, 1)), [0.5, 0.5], 1.0 - np.eye(2), 0.4 if reject else None
    )
    message = "array 'novelty_threshold' has shape (1,), expected ()" if reject else "needs gaussian evidence and a"
    with pytest.raises(ArtefactError, match=re.escape(message)):
        Rule(rule.manifest, dict(rule.params) | {"novelty_threshold": threshold})
