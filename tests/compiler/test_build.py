"""Compile: Policy + fitted evidence -> Rule, and the artefact it is written to."""

from __future__ import annotations

import csv
import hashlib
import os
import shutil
import subprocess
import sys
from pathlib import Path

import numpy as np
import pytest
from helpers import (
    CLAIMS,
    DEMOS,
    PACKHOUSE,
    compile_text,
    loglik_evidence,
    policy_text,
    posterior_evidence,
    read_csv_columns,
    two_class_text,
)

import policyc.files
from policyc.compiler import write_artefact, write_module
from policyc.compiler.artefact import artefact_bytes
from policyc.compiler.build import compile_policy
from policyc.language.diagnostics import CompileError, PolicyError
from policyc.runtime import FORMAT_NAME, FORMAT_VERSION, load_rule
from policyc.runtime.artefact import decode_rule, encode_rule

DEMO_POLICIES = sorted(DEMOS.glob("*/policy*.yaml"))


@pytest.mark.parametrize("path", DEMO_POLICIES, ids=lambda p: p.parent.name)
def test_compiling_twice_gives_identical_bytes(path: Path, tmp_path: Path) -> None:
    first, second = compile_policy(path), compile_policy(path)
    assert artefact_bytes(first.rule) == artefact_bytes(second.rule)
    write_artefact(first.rule, tmp_path / "a.rule")
    write_artefact(second.rule, tmp_path / "b.rule")
    assert (tmp_path / "a.rule").read_bytes() == (tmp_path / "b.rule").read_bytes()
    write_module(first.rule, tmp_path / "a.py")
    write_module(second.rule, tmp_path / "b.py")
    assert (tmp_path / "a.py").read_bytes() == (tmp_path / "b.py").read_bytes()


def test_compiling_in_fresh_interpreters_with_different_hash_seeds_gives_identical_bytes(tmp_path: Path) -> None:
    runs = []
    for seed in ("1", "12345"):
        out = tmp_path / seed
        out.mkdir()
        env = os.environ | {"PYTHONHASHSEED": seed}
        command = [sys.executable, "-m", "policyc", "compile", str(PACKHOUSE), "-o", str(out / "p.rule")]
        command += ["--emit-python", str(out / "p.py")]
        runs.append((out, subprocess.Popen(command, env=env, stdout=subprocess.PIPE, stderr=subprocess.PIPE)))
    for _, process in runs:
        _, stderr = process.communicate(timeout=120)
        assert process.returncode == 0, stderr.decode()
    (one, _), (two, _) = runs
    assert (one / "p.rule").read_bytes() == (two / "p.rule").read_bytes()
    assert (one / "p.py").read_bytes() == (two / "p.py").read_bytes()
    assert (one / "p.rule").read_bytes() == artefact_bytes(compile_policy(PACKHOUSE).rule)


@pytest.mark.parametrize("path", DEMO_POLICIES, ids=lambda p: p.parent.name)
def test_artefact_round_trip_is_byte_stable(path: Path, tmp_path: Path) -> None:
    rule = compile_policy(path).rule
    target = tmp_path / "rule.rule"
    digest = write_artefact(rule, target)
    data = target.read_bytes()
    manifest, params = decode_rule(data)
    assert manifest["content_sha256"] == digest == rule.content_sha256
    assert manifest == dict(rule.manifest)
    assert set(params) == set(rule.params)
    for name, array in params.items():
        assert array.dtype == np.float64 and np.array_equal(array, rule.params[name]), name
    # encode(decode(x)) == x, by the encoder and through a loaded Rule
    stripped = {k: v for k, v in manifest.items() if k not in ("arrays", "content_sha256")}
    assert encode_rule(stripped, params) == data
    assert artefact_bytes(load_rule(target)) == data


def test_manifest_records_sources_and_format(tmp_path: Path) -> None:
    rule = compile_policy(PACKHOUSE).rule
    manifest = rule.manifest
    assert manifest["format"] == FORMAT_NAME and manifest["format_version"] == FORMAT_VERSION
    assert manifest["policy"] == "packhouse-grading" and manifest["revision"] == 3
    assert manifest["policy_sha256"] == hashlib.sha256(PACKHOUSE.read_bytes()).hexdigest()
    train = PACKHOUSE.parent / "train.csv"
    assert manifest["training_sha256"] == hashlib.sha256(train.read_bytes()).hexdigest()
    assert manifest["evidence"]["kind"] == "gaussian"
    assert manifest["reject_action"] == "hold_for_inspector" and manifest["reject_cost"] == 2.5
    assert manifest["arrays"]["whitening"] == [12, 4]
    assert "created" not in manifest and "timestamp" not in manifest


def test_compiled_arrays_follow_the_policy() -> None:
    rule = compile_policy(PACKHOUSE).rule
    # loss[action][class] with the reject row (constant d) last
    expected_loss = np.array([[0, 4, 30], [2, 0, 20], [6, 3, 1], [2.5, 2.5, 2.5]], dtype=float)
    assert np.array_equal(rule.params["loss"], expected_loss)
    assert np.allclose(np.exp(rule.params["log_priors"]), [0.55, 0.35, 0.10], rtol=1e-15, atol=0)
    assert rule.actions[-1] == rule.reject_action == "hold_for_inspector"


def test_packhouse_posteriors_match_scikit_learn_qda(tmp_path: Path) -> None:
    from sklearn.discriminant_analysis import QuadraticDiscriminantAnalysis

    rule = compile_policy(PACKHOUSE).rule
    train = read_csv_columns(PACKHOUSE.parent / "train.csv", rule.features)
    with (PACKHOUSE.parent / "train.csv").open(newline="") as handle:
        labels = np.array([row["grade"] for row in csv.DictReader(handle)])
    holdout = read_csv_columns(PACKHOUSE.parent / "holdout.csv", rule.features)
    priors = {"premium": 0.55, "standard": 0.35, "defect": 0.10}
    sorted_classes = sorted(priors)  # scikit-learn orders classes_ (and its priors) by np.unique
    qda = QuadraticDiscriminantAnalysis(priors=[priors[c] for c in sorted_classes]).fit(train, labels)
    assert list(qda.classes_) == sorted_classes
    order = [sorted_classes.index(c) for c in rule.classes]
    # ML full covariances = QDA predict_log_proba in scikit-learn 1.9.1 (references.md SK-6)
    expected = qda.predict_log_proba(holdout)[:, order]
    assert np.allclose(np.log(rule.posteriors(holdout)), expected, rtol=0, atol=1e-9)


def test_claims_rule_corrects_posteriors_to_deployment_priors() -> None:
    rule = compile_policy(CLAIMS).rule
    X = read_csv_columns(CLAIMS.parent / "incoming.csv", rule.features)
    p = X[:, 1]
    # Saerens et al. 2002 known new priors / Elkan 2001 Theorem 2 (references.md SA-1, EL-7):
    # p' = b'(p - pb) / (b - pb + b'p - bb') with b = 0.5 trained, b' = 0.03 deployed positive rate
    b, b_new = 0.5, 0.03
    expected = b_new * (p - p * b) / (b - p * b + b_new * p - b * b_new)
    assert np.allclose(rule.posteriors(X)[:, 1], expected, rtol=1e-12, atol=1e-15)


def test_posterior_correction_golden_value(tmp_path: Path) -> None:
    # Elkan 2001 Theorem 2 = Saerens et al. 2002 for K = 2 (references.md EL-7, SA-1):
    # p = 0.3, b = 0.5, b' = 0.1 -> p' = 1/22 = 0.0454545
    b, b_new, p = 0.5, 0.1, 0.3
    p_new = b_new * (p - p * b) / (b - p * b + b_new * p - b * b_new)
    assert p_new == pytest.approx(1.0 / 22.0, abs=1e-15)
    assert p_new == pytest.approx(0.0454545, abs=5e-8)
    classes = ["negative", "positive"]
    rule = compile_text(
        tmp_path,
        policy_text(
            classes=classes,
            priors=[1.0 - b_new, b_new],
            actions=["accept", "flag"],
            loss=np.array([[0.0, 10.0], [1.0, 0.0]]),
            evidence=posterior_evidence(classes, [1.0 - b, b]),
        ),
    ).rule
    assert rule.posteriors(np.array([[1.0 - p, p]]))[0, 1] == pytest.approx(1.0 / 22.0, rel=1e-14)


def test_gain_policy_compiles_to_negated_losses(tmp_path: Path) -> None:
    classes = ["good", "bad"]
    text = policy_text(
        classes=classes,
        priors=[0.8, 0.2],
        actions=["accept", "decline"],
        loss=np.zeros((2, 2)),
        evidence=loglik_evidence(classes),
    )
    text = text.replace("loss:", "gain:") + "reject: {action: review, gain: -1.5}\n"
    text = text.replace('"accept": {"good": 0.0, "bad": 0.0}', '"accept": {"good": 10.0, "bad": -40.0}')
    text = text.replace('"decline": {"good": 0.0, "bad": 0.0}', '"decline": {"good": -2.0, "bad": 0.0}')
    rule = compile_text(tmp_path, text).rule
    assert np.array_equal(rule.params["loss"], [[-10.0, 40.0], [2.0, -0.0], [1.5, 1.5]])
    assert rule.manifest["loss_stated_as"] == "gain" and rule.manifest["reject_cost"] == 1.5


def test_training_priors_are_the_class_frequencies(tmp_path: Path) -> None:
    text = PACKHOUSE.read_text(encoding="utf-8").replace(
        "priors: {premium: 0.55, standard: 0.35, defect: 0.10}", "priors: training"
    )
    policy = tmp_path / "policy.yaml"
    policy.write_text(text, encoding="utf-8")
    (tmp_path / "train.csv").write_bytes((PACKHOUSE.parent / "train.csv").read_bytes())
    rule = compile_policy(policy).rule
    counts = rule.manifest["training_class_counts"]
    total = sum(counts.values())
    assert total == 2400
    assert np.allclose(np.exp(rule.params["log_priors"]), [counts[c] / total for c in rule.classes], rtol=1e-15)
    assert rule.manifest["priors_source"] == "training"


def test_policy_errors_raise_with_codes_and_lines(tmp_path: Path) -> None:
    text = two_class_text(
        priors=[0.6, 0.6],
    )
    with pytest.raises(PolicyError) as info:
        compile_text(tmp_path, text)
    assert "priors-do-not-sum-to-one" in info.value.codes
    (diagnostic,) = [d for d in info.value.diagnostics if d.code == "priors-do-not-sum-to-one"]
    assert diagnostic.line == 4 and diagnostic.file is not None and diagnostic.file.endswith("policy.yaml")


def test_unknown_training_label_is_a_compile_error(tmp_path: Path) -> None:
    text = PACKHOUSE.read_text(encoding="utf-8")
    lines = (PACKHOUSE.parent / "train.csv").read_text(encoding="utf-8").splitlines()
    lines[5] = lines[5].rsplit(",", 1)[0] + ",bruised"
    (tmp_path / "train.csv").write_text("\n".join(lines) + "\n", encoding="utf-8")
    digest = hashlib.sha256((tmp_path / "train.csv").read_bytes()).hexdigest()
    text = text.replace("a8321964a69bebf453ef7c2836e588ec539aea1b5eafb38041dcda5dfbb45bfe", digest)
    with pytest.raises(CompileError) as info:
        compile_text(tmp_path, text)
    assert info.value.codes == ["unknown-label"]
    assert "row 5" in str(info.value) and "bruised" in str(info.value)


# --- atomic writes ---------------------------------------------------------------------------------------


def leftovers(directory: Path) -> list[str]:
    return sorted(p.name for p in directory.iterdir())


@pytest.mark.parametrize("writer", [write_artefact, write_module], ids=["artefact", "module"])
def test_failed_write_leaves_nothing_behind(writer, tmp_path: Path, monkeypatch: pytest.MonkeyPatch) -> None:
    rule = compile_policy(PACKHOUSE).rule

    def refuse(source: object, target: object) -> None:
        raise OSError(28, "No space left on device")

    monkeypatch.setattr(policyc.files.os, "replace", refuse)
    with pytest.raises(OSError, match="No space"):
        writer(rule, tmp_path / "out.file")
    assert leftovers(tmp_path) == []


def test_failed_write_keeps_the_previous_file(tmp_path: Path, monkeypatch: pytest.MonkeyPatch) -> None:
    rule = compile_policy(PACKHOUSE).rule
    target = tmp_path / "p.rule"
    write_artefact(rule, target)
    before = target.read_bytes()

    def refuse(source: object, target: object) -> None:
        raise OSError(5, "Input/output error")

    monkeypatch.setattr(policyc.files.os, "replace", refuse)
    with pytest.raises(OSError):
        write_artefact(compile_policy(CLAIMS).rule, target)
    assert target.read_bytes() == before
    assert leftovers(tmp_path) == ["p.rule"]


def test_failure_while_writing_the_temporary_file_leaves_nothing(
    tmp_path: Path, monkeypatch: pytest.MonkeyPatch
) -> None:
    rule = compile_policy(PACKHOUSE).rule

    def broken_fsync(fd: int) -> None:
        raise OSError(5, "Input/output error")

    monkeypatch.setattr(policyc.files.os, "fsync", broken_fsync)
    with pytest.raises(OSError):
        write_artefact(rule, tmp_path / "p.rule")
    assert leftovers(tmp_path) == []


@pytest.mark.skipif(os.name != "posix" or os.geteuid() == 0, reason="needs a non-root POSIX user")
def test_unwritable_directory_leaves_nothing(tmp_path: Path) -> None:
    rule = compile_policy(PACKHOUSE).rule
    locked = tmp_path / "locked"
    locked.mkdir()
    locked.chmod(0o500)
    try:
        with pytest.raises(PermissionError):
            write_artefact(rule, locked / "p.rule")
        assert leftovers(locked) == []
    finally:
        locked.chmod(0o700)


def test_written_files_are_world_readable(tmp_path: Path) -> None:
    rule = compile_policy(PACKHOUSE).rule
    write_artefact(rule, tmp_path / "p.rule")
    assert (tmp_path / "p.rule").stat().st_mode & 0o777 == 0o644


def test_training_data_changed_between_check_and_fit_is_refused(monkeypatch: pytest.MonkeyPatch) -> None:
    # The check compares the pin with the file; the fit hashes what it actually read. If those differ
    # (the file was replaced mid-compile), the rule must not claim the pinned data.
    import policyc.evidence.gaussian

    monkeypatch.setattr(policyc.evidence.gaussian, "data_sha256", lambda files: "0" * 64)
    with pytest.raises(CompileError) as caught:
        compile_policy(DEMOS / "packhouse" / "policy.yaml")
    assert caught.value.codes == ["training-data-hash-mismatch"]
    assert "changed while compiling" in str(caught.value)


def test_a_compile_reads_the_training_file_once_for_its_digest(tmp_path: Path, monkeypatch: pytest.MonkeyPatch) -> None:
    # the check hashes the pinned file, the fit asks again after reading it: the second answer costs a stat
    shutil.copy(DEMOS / "packhouse" / "policy.yaml", tmp_path / "policy.yaml")
    shutil.copy(DEMOS / "packhouse" / "train.csv", tmp_path / "train.csv")
    monkeypatch.setattr(policyc.files, "_DIGESTS", {})
    read: list[Path] = []
    real = policyc.files._read_sha256
    monkeypatch.setattr(policyc.files, "_read_sha256", lambda path: read.append(path) or real(path))
    compile_policy(tmp_path / "policy.yaml")
    assert read.count(tmp_path / "train.csv") == 1


def test_a_file_rewritten_in_place_with_its_old_size_and_time_is_hashed_again(tmp_path: Path) -> None:
    data = tmp_path / "train.csv"
    data.write_bytes(b"x,label\n1,a\n")
    assert policyc.files.file_sha256(data) == hashlib.sha256(b"x,label\n1,a\n").hexdigest()
    status = data.stat()
    data.write_bytes(b"x,label\n2,a\n")
    os.utime(data, ns=(status.st_atime_ns, status.st_mtime_ns))  # same size and modification time
    assert policyc.files.file_sha256(data) == hashlib.sha256(b"x,label\n2,a\n").hexdigest()
