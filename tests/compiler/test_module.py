"""The standalone module written by ``--emit-python``: numpy only, lint-clean, bit-identical to the runtime."""

from __future__ import annotations

import ast
import json
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
    gaussian_rule,
    loglik_evidence,
    policy_text,
    random_spd,
    read_csv_columns,
    rule_from_text,
    standalone,
)

from policyc.compiler import module_source, write_module
from policyc.compiler.build import compile_policy
from policyc.runtime import Rule

RUFF = shutil.which("ruff") or str(Path(sys.executable).parent / "ruff")


@pytest.fixture(scope="module")
def packhouse() -> Rule:
    return compile_policy(PACKHOUSE).rule


@pytest.fixture(scope="module")
def claims() -> Rule:
    return compile_policy(CLAIMS).rule


def random_gaussian_rule(seed: int, invalid_input: str = "reject") -> Rule:
    rng = np.random.default_rng(seed)
    n_classes, d = 3, 3
    means = rng.normal(0.0, 1.5, (n_classes, d))
    covariances = np.array([random_spd(rng, d) for _ in range(n_classes)])
    priors = rng.dirichlet(np.full(n_classes, 3.0))
    loss = rng.uniform(0.0, 10.0, (4, n_classes))
    return gaussian_rule(means, covariances, priors, loss, reject_cost=3.0, invalid_input=invalid_input)


def with_invalid_rows(X: np.ndarray) -> np.ndarray:
    X = X.copy()
    X[1, 0] = np.nan
    X[4, -1] = np.inf
    X[7, :] = -np.inf
    X[9, 0] = 1e300  # finite, but every squared distance overflows
    return X


def assert_bit_identical(rule: Rule, module: object, X: np.ndarray) -> None:
    assert np.array_equal(module.decide(X), rule.decide(X))  # type: ignore[attr-defined]
    assert np.array_equal(module.posteriors(X), rule.posteriors(X), equal_nan=True)  # type: ignore[attr-defined]
    assert np.array_equal(module.risks(X), rule.risks(X), equal_nan=True)  # type: ignore[attr-defined]


def imported_modules(source: str) -> set[str]:
    names = set()
    for node in ast.walk(ast.parse(source)):
        if isinstance(node, ast.Import):
            names.update(alias.name for alias in node.names)
        elif isinstance(node, ast.ImportFrom):
            names.add("." * node.level + (node.module or ""))
    return names


@pytest.mark.parametrize("demo", ["packhouse", "claims"])
def test_module_imports_only_numpy_and_the_standard_library(demo: str, request: pytest.FixtureRequest) -> None:
    rule = request.getfixturevalue(demo)
    imported = imported_modules(module_source(rule))
    assert "numpy" in imported and imported - {"numpy"} <= set(sys.stdlib_module_names)


@pytest.mark.skipif(not Path(RUFF).exists(), reason="ruff is not installed")
@pytest.mark.parametrize("demo", ["packhouse", "claims"])
def test_module_passes_ruff(demo: str, request: pytest.FixtureRequest, tmp_path: Path) -> None:
    path = tmp_path / "rule_module.py"
    write_module(request.getfixturevalue(demo), path)
    result = subprocess.run([RUFF, "check", "--isolated", str(path)], capture_output=True, text=True, check=False)
    assert result.returncode == 0, result.stdout + result.stderr


def test_module_exposes_the_api(packhouse: Rule, tmp_path: Path) -> None:
    module = standalone(packhouse, tmp_path)
    assert packhouse.classes == module.CLASSES
    assert packhouse.actions == module.ACTIONS
    assert packhouse.features == module.FEATURES
    assert packhouse.manifest["policy_sha256"] == module.POLICY_SHA256
    assert packhouse.content_sha256 == module.RULE_SHA256
    assert packhouse.manifest["policy"] == module.POLICY
    assert packhouse.manifest["revision"] == module.REVISION
    for name in ("decide", "posteriors", "risks"):
        assert callable(getattr(module, name))
    assert set(module.PARAMS) == set(packhouse.params)
    for name, array in packhouse.params.items():
        # repr of a float64 reads back exactly
        assert np.array_equal(module.PARAMS[name], array), name


def test_packhouse_module_is_bit_identical(packhouse: Rule, tmp_path: Path) -> None:
    module = standalone(packhouse, tmp_path)
    for csv in ("incoming.csv", "holdout.csv", "train.csv"):
        X = read_csv_columns(DEMOS / "packhouse" / csv, packhouse.features)
        assert_bit_identical(packhouse, module, X)
    X = read_csv_columns(DEMOS / "packhouse" / "incoming.csv", packhouse.features)
    invalid = with_invalid_rows(X[:20])
    assert_bit_identical(packhouse, module, invalid)
    assert (module.decide(invalid)[[1, 4, 7, 9]] == len(packhouse.actions) - 1).all()
    assert_bit_identical(packhouse, module, X.astype(np.float32))


def test_claims_module_is_bit_identical(claims: Rule, tmp_path: Path) -> None:
    module = standalone(claims, tmp_path)
    X = read_csv_columns(DEMOS / "claims" / "holdout.csv", claims.features)
    assert_bit_identical(claims, module, X)
    invalid = X[:12].copy()
    invalid[2] = [0.7, 0.7]  # does not sum to one
    invalid[5] = [-0.1, 1.1]  # outside [0, 1]
    invalid[8, 1] = np.nan
    assert_bit_identical(claims, module, invalid)
    assert claims.explain(invalid).valid.tolist().count(False) == 3


@pytest.mark.parametrize("seed", [0, 1, 2])
def test_random_gaussian_module_is_bit_identical(seed: int, tmp_path: Path) -> None:
    rule = random_gaussian_rule(seed)
    module = standalone(rule, tmp_path)
    rng = np.random.default_rng(100 + seed)
    X = rng.normal(0.0, 3.0, (9000, 3))  # more than two kernel chunks
    X[:50] *= 1e3  # far field
    assert_bit_identical(rule, module, X)
    assert_bit_identical(rule, module, with_invalid_rows(X[:20]))


def test_module_raises_like_the_runtime_under_invalid_input_error(tmp_path: Path) -> None:
    rule = random_gaussian_rule(5, invalid_input="error")
    module = standalone(rule, tmp_path)
    X = with_invalid_rows(np.zeros((10, 3)))
    with pytest.raises(ValueError, match=r"row\(s\) 1, 4, 7, 9 \(0-based\)") as from_module:
        module.decide(X)
    assert type(from_module.value).__name__ == "InputError"
    with pytest.raises(ValueError, match="expected 3 feature columns"):
        module.decide(np.zeros((2, 2)))


def test_module_for_log_likelihood_evidence_without_reject(tmp_path: Path) -> None:
    classes = ["a", "b", "c"]
    rule = rule_from_text(
        policy_text(
            classes=classes,
            priors=[0.2, 0.3, 0.5],
            actions=["x", "y"],
            loss=np.array([[0.0, 1.0, 5.0], [3.0, 1.0, 0.0]]),
            evidence=loglik_evidence(classes),
        )
    )
    module = standalone(rule, tmp_path)
    X = np.random.default_rng(9).normal(-5.0, 4.0, (500, 3))
    X[3, 1] = -np.inf
    assert_bit_identical(rule, module, X)


def test_module_runs_in_a_fresh_interpreter_without_policyc(packhouse: Rule, tmp_path: Path) -> None:
    path = tmp_path / "packhouse_rule.py"
    write_module(packhouse, path)
    X = read_csv_columns(DEMOS / "packhouse" / "incoming.csv", packhouse.features)[:50]
    script = (
        "import json, sys\n"
        "import packhouse_rule as m\n"
        f"X = {json.dumps(X.tolist())}\n"
        "print(json.dumps({'decide': m.decide(X).tolist(),"
        " 'policyc': sorted(n for n in sys.modules if n.split('.')[0] == 'policyc')}))\n"
    )
    # -I: isolated mode, the project checkout is not on the path; only the venv's site-packages remain
    result = subprocess.run(
        [sys.executable, "-I", "-c", f"import sys; sys.path.insert(0, {str(tmp_path)!r})\n{script}"],
        capture_output=True,
        text=True,
        check=True,
        cwd=tmp_path,
    )
    report = json.loads(result.stdout)
    assert report["decide"] == packhouse.decide(X).tolist()
    assert report["policyc"] == []


def test_module_source_is_deterministic_and_names_the_rule(packhouse: Rule) -> None:
    source = module_source(packhouse)
    assert source == module_source(compile_policy(PACKHOUSE).rule)
    assert packhouse.content_sha256 in source
    assert "hold_for_inspector" in source


@pytest.mark.parametrize("path", sorted(DEMOS.glob("*/policy*.yaml")), ids=lambda p: f"{p.parent.name}/{p.stem}")
def test_every_demo_revision_module_is_bit_identical(path: Path, tmp_path: Path) -> None:
    # every revision, calibration (claims r2), novelty (packhouse r5) and limits (packhouse r6) included, on the
    # demo's own tables and on rows far from every class (novelty deferrals) and invalid rows
    rule = compile_policy(path).rule
    module = standalone(rule, tmp_path)
    for csv in sorted(path.parent.glob("*.csv")):
        X = read_csv_columns(csv, rule.features) if _has_columns(csv, rule.features) else None
        if X is not None:
            assert_bit_identical(rule, module, X)
    far = np.full((4, len(rule.features)), 0.5) * np.array([[1.0], [40.0], [-40.0], [400.0]])
    assert_bit_identical(rule, module, np.vstack([far, with_invalid_rows(np.vstack([far] * 3))]))


def _has_columns(csv: Path, columns: tuple[str, ...]) -> bool:
    header = csv.read_text(encoding="utf-8").splitlines()[0].split(",")
    return set(columns) <= set(header)
