"""Builders shared by the compile, runtime, emit, reference and diff tests.

Policies are written as YAML text (JSON flow mappings are YAML too, and ``json.dumps``
writes every float64 so that it reads back exactly). Two ways to get a Rule:

* :func:`compile_text` writes the policy to a directory and runs the whole compiler
  (source, model, checks, evidence, compile), as ``policyc compile`` does;
* :func:`rule_from_text` and :func:`gaussian_rule` skip the consistency checks (a few
  linear programs per policy) and call the compiler's assembly step directly; property
  tests that build hundreds of rules use them.
"""

from __future__ import annotations

import hashlib
import importlib.util
import json
import sys
import textwrap
from collections.abc import Sequence
from pathlib import Path
from types import ModuleType
from typing import Any

import numpy as np

from policyc.compiler import write_module
from policyc.compiler.build import CompiledPolicy, compile_policy, rule_from_parts
from policyc.evidence import FittedEvidence, fit_evidence
from policyc.evidence.gaussian import GaussianFit, kernel_params
from policyc.language.model import build_policy
from policyc.language.source import parse_source
from policyc.review.shared.loading import LoadedRule, load_rule_or_policy
from policyc.runtime import Rule

ROOT = Path(__file__).resolve().parent.parent
DEMOS = ROOT / "policies-demo"
PACKHOUSE = DEMOS / "packhouse" / "policy.yaml"
CLAIMS = DEMOS / "claims" / "policy.yaml"


def names(prefix: str, count: int) -> list[str]:
    return [f"{prefix}{i}" for i in range(count)]


def policy_text(
    *,
    classes: Sequence[str],
    priors: Sequence[float] | str,
    actions: Sequence[str],
    loss: np.ndarray,
    evidence: dict[str, Any],
    reject_cost: float | None = None,
    reject_action: str = "reject",
    invalid_input: str = "error",
    name: str = "test-policy",
    novelty_coverage: float | None = None,
) -> str:
    """YAML text of a policy; ``loss`` has shape (len(actions), len(classes)), rows are actions."""
    loss = np.asarray(loss, dtype=float)
    assert loss.shape == (len(actions), len(classes))
    prior_value: Any = priors if isinstance(priors, str) else dict(zip(classes, map(float, priors), strict=True))
    lines = [
        f"policy: {name}",
        "revision: 1",
        f"classes: {json.dumps(list(classes))}",
        f"priors: {json.dumps(prior_value)}",
        f"actions: {json.dumps(list(actions))}",
        "loss:",
        *(
            f"  {json.dumps(a)}: {json.dumps(dict(zip(classes, map(float, row), strict=True)))}"
            for a, row in zip(actions, loss, strict=True)
        ),
        f"invalid_input: {invalid_input}",
        f"evidence: {json.dumps(evidence)}",
    ]
    if reject_cost is not None:
        reject: dict[str, Any] = {"action": reject_action, "cost": float(reject_cost)}
        if novelty_coverage is not None:
            reject["novelty"] = {"coverage": novelty_coverage}
        lines.append(f"reject: {json.dumps(reject)}")
    return "\n".join(lines) + "\n"


def loglik_evidence(classes: Sequence[str]) -> dict[str, Any]:
    """Log-likelihood evidence with one input column ``ll_<class>`` per class."""
    return {"kind": "log-likelihood", "columns": {c: f"ll_{c}" for c in classes}}


def posterior_evidence(classes: Sequence[str], trained_priors: Sequence[float]) -> dict[str, Any]:
    """Posterior evidence with columns ``p_<class>`` and the upstream model's training priors."""
    return {
        "kind": "posterior",
        "columns": {c: f"p_{c}" for c in classes},
        "trained_priors": dict(zip(classes, map(float, trained_priors), strict=True)),
        "calibration": {"method": "none"},
    }


def rule_from_text(text: str) -> Rule:
    """Assemble a Rule from policy text without the consistency checks (log-likelihood/posterior evidence)."""
    document = parse_source(text, "policy.yaml")
    policy = build_policy(document)
    return rule_from_parts(policy, fit_evidence(policy, None), document.sha256)


def compile_text(directory: Path, text: str, filename: str = "policy.yaml") -> CompiledPolicy:
    """Write the policy into ``directory`` and run the full compiler on it."""
    path = directory / filename
    path.write_text(text, encoding="utf-8")
    return compile_policy(path)


def gaussian_rule(
    means: np.ndarray,
    covariances: np.ndarray,
    priors: Sequence[float],
    loss: np.ndarray,
    reject_cost: float | None = None,
    invalid_input: str | None = None,
    covariance: str = "full",
    novelty_coverage: float | None = None,
) -> Rule:
    """A Gaussian-evidence Rule from exact parameters (nothing fitted).

    ``means`` (K, d), ``covariances`` (K, d, d); ``invalid_input`` defaults to reject when there is
    a reject option, else error. The arrays go through the compiler's own
    :func:`kernel_params` and :func:`rule_from_parts`, so the rule is what ``compile`` would
    produce had the fit returned exactly these parameters.
    """
    means = np.asarray(means, dtype=float)
    covariances = np.asarray(covariances, dtype=float)
    if invalid_input is None:
        invalid_input = "reject" if reject_cost is not None else "error"
    n_classes, n_features = means.shape
    classes, actions, features = names("c", n_classes), names("a", np.shape(loss)[0]), names("x", n_features)
    evidence = {
        "kind": "gaussian",
        "covariance": covariance,
        "features": features,
        "training": {"data": "unused.csv", "label": "y"},
    }
    text = policy_text(
        classes=classes,
        priors=priors,
        actions=actions,
        loss=loss,
        evidence=evidence,
        reject_cost=reject_cost,
        invalid_input=invalid_input,
        name="gaussian-test",
        novelty_coverage=novelty_coverage,
    )
    document = parse_source(text, "policy.yaml")
    policy = build_policy(document)
    fit = GaussianFit(means, covariances, (0.0,) * n_classes, (1,) * n_classes)
    fitted = FittedEvidence(tuple(features), kernel_params(fit), {"kind": "gaussian", "covariance": covariance})
    return rule_from_parts(policy, fitted, document.sha256)


def random_spd(rng: np.random.Generator, d: int, low: float = 0.3, high: float = 3.0) -> np.ndarray:
    """A random symmetric positive-definite matrix with eigenvalues in [low, high]."""
    q, _ = np.linalg.qr(rng.standard_normal((d, d)))
    matrix = q @ np.diag(rng.uniform(low, high, d)) @ q.T
    return 0.5 * (matrix + matrix.T)


def random_covariances(rng: np.random.Generator, n_classes: int, dim: int, covariance: str) -> np.ndarray:
    """(K, d, d) covariances of the given structure: one shared SPD matrix (tied), diagonals, or K SPD matrices."""
    if covariance == "tied":
        return np.array([random_spd(rng, dim)] * n_classes)
    if covariance == "diagonal":
        return np.array([np.diag(rng.uniform(0.3, 3.0, dim)) for _ in range(n_classes)])
    return np.array([random_spd(rng, dim) for _ in range(n_classes)])


def import_module_from(path: Path, name: str) -> ModuleType:
    """Import a generated module from a file under a unique name."""
    spec = importlib.util.spec_from_file_location(name, path)
    assert spec is not None and spec.loader is not None
    module = importlib.util.module_from_spec(spec)
    sys.modules[name] = module
    try:
        spec.loader.exec_module(module)
    finally:
        sys.modules.pop(name, None)
    return module


_module_counter = 0


def standalone(rule: Rule, directory: Path) -> ModuleType:
    """Write the standalone module for ``rule`` into ``directory`` and import it."""
    global _module_counter
    _module_counter += 1
    name = f"policyc_generated_{_module_counter}"
    path = directory / f"{name}.py"
    write_module(rule, path)
    return import_module_from(path, name)


def sha256_of(path: Path) -> str:
    return hashlib.sha256(path.read_bytes()).hexdigest()


def read_csv_columns(path: Path, columns: Sequence[str]) -> np.ndarray:
    """Numeric columns of a CSV file as a float64 (n, len(columns)) array, read with the csv module."""
    import csv

    with path.open(newline="", encoding="utf-8") as handle:
        rows = list(csv.DictReader(handle))
    return np.array([[float(row[c]) for c in columns] for row in rows], dtype=np.float64)


def two_class_text(**overrides: Any) -> str:
    """A two-class 0-1 loss policy (classes c0, c1; actions a0, a1) on log-likelihood columns."""
    classes = ["c0", "c1"]
    settings: dict[str, Any] = {
        "classes": classes,
        "priors": [0.5, 0.5],
        "actions": ["a0", "a1"],
        "loss": np.array([[0.0, 1.0], [1.0, 0.0]]),
        "evidence": loglik_evidence(classes),
    }
    return policy_text(**(settings | overrides))


def write_partitions(
    directory: Path, X: np.ndarray, labels: Sequence[str], n_files: int, suffix: str = ".parquet"
) -> list[Path]:
    """Split rows in order into ``n_files`` files ``part-00.parquet`` … of features ``f0`` … and ``label``."""
    import pyarrow as pa
    import pyarrow.csv as pacsv
    import pyarrow.parquet as pq

    directory.mkdir(parents=True, exist_ok=True)
    paths = []
    for index, rows in enumerate(np.array_split(np.arange(X.shape[0]), n_files)):
        columns = {f"f{j}": X[rows, j] for j in range(X.shape[1])} | {"label": [labels[r] for r in rows]}
        table = pa.table(columns)
        path = directory / f"part-{index:02d}{suffix}"
        (pq.write_table if suffix == ".parquet" else pacsv.write_csv)(table, path)
        paths.append(path)
    return paths


def wine_policy_text(
    training: str, shrinkage: str = "auto", covariance: str = "full", invalid_input: str = "error"
) -> str:
    """A three-class 0-1 policy with a reject option on the 13 wine features ``f0`` … ``f12``."""
    classes = ["c0", "c1", "c2"]
    evidence = {
        "kind": "gaussian",
        "covariance": covariance,
        "shrinkage": shrinkage,
        "features": names("f", 13),
        "training": {"data": training, "label": "label"},
    }
    loss = 1.0 - np.eye(3)
    return policy_text(
        classes=classes,
        priors="training",
        actions=names("a", 3),
        loss=loss,
        evidence=evidence,
        reject_cost=0.2,
        invalid_input=invalid_input,
    )


def iris_posterior_policy_text() -> str:
    """A three-class 0-1 policy with a reject option over posterior columns ``f0`` … ``f2`` of an upstream model
    trained under equal priors, deployed under priors (0.2, 0.3, 0.5)."""
    classes = ["c0", "c1", "c2"]
    evidence = posterior_evidence(classes, [1 / 3] * 3) | {"columns": {c: f"f{k}" for k, c in enumerate(classes)}}
    loss = 1.0 - np.eye(3)
    return policy_text(
        classes=classes, priors=[0.2, 0.3, 0.5], actions=names("a", 3), loss=loss, evidence=evidence, reject_cost=0.3
    )


def write_iris_posteriors(directory: Path, n_files: int, suffix: str = ".csv") -> list[Path]:
    """Gaussian naive Bayes posteriors of Fisher's iris data (scikit-learn's copy; the model fitted on all 150 rows,
    so its priors are the equal class shares) as ``f0`` … ``f2`` with the true class, split in order into files."""
    from sklearn.datasets import load_iris
    from sklearn.naive_bayes import GaussianNB

    X, y = load_iris(return_X_y=True)
    posteriors = GaussianNB().fit(X, y).predict_proba(X)
    return write_partitions(directory, posteriors, [f"c{k}" for k in y], n_files, suffix)


def binary_policy(c00: float, c01: float, c10: float, c11: float, revision: int = 1) -> str:
    """Two classes (neg = 0, pos = 1) with Elkan's cost indices: c_ij = cost of predicting i when the truth is j."""
    return textwrap.dedent(
        f"""\
        policy: binary
        revision: {revision}
        classes: [neg, pos]
        priors: {{neg: 0.5, pos: 0.5}}
        actions: [say_neg, say_pos]
        loss:
          say_neg: {{neg: {c00}, pos: {c01}}}
          say_pos: {{neg: {c10}, pos: {c11}}}
        evidence:
          kind: posterior
          columns: {{neg: p_neg, pos: p_pos}}
          trained_priors: {{neg: 0.5, pos: 0.5}}
          calibration: {{method: none}}
        """
    )


def three_class_policy(reject_cost: float | None, revision: int = 1) -> str:
    """0-1 loss over three classes, optionally with a reject option of cost t."""
    reject = f"reject: {{action: defer, cost: {reject_cost}}}\n" if reject_cost is not None else ""
    return (
        textwrap.dedent(
            f"""\
        policy: three
        revision: {revision}
        classes: [a, b, c]
        priors: {{a: 0.3, b: 0.3, c: 0.4}}
        actions: [say_a, say_b, say_c]
        loss:
          say_a: {{a: 0, b: 1, c: 1}}
          say_b: {{a: 1, b: 0, c: 1}}
          say_c: {{a: 1, b: 1, c: 0}}
        evidence:
          kind: posterior
          columns: {{a: p_a, b: p_b, c: p_c}}
          trained_priors: {{a: 0.3, b: 0.3, c: 0.4}}
          calibration: {{method: none}}
        """
        )
        + reject
    )


def load_text(directory: Path, name: str, text: str) -> LoadedRule:
    path = directory / name
    path.write_text(text, encoding="utf-8")
    return load_rule_or_policy(path)


def position(path: Path, text: str, line_start: str, value: str) -> str:
    """``file:line:col`` of ``value`` on the first line of ``text`` that starts with ``line_start`` (1-based)."""
    lines = text.splitlines()
    line = next(i for i, content in enumerate(lines, 1) if content.lstrip().startswith(line_start))
    return f"{path}:{line}:{lines[line - 1].index(value, len(line_start) - 1) + 1}"
