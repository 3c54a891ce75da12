"""The runtime's import budget: numpy and the standard library only (modelled on click's test_imports)."""

from __future__ import annotations

import ast
import json
import subprocess
import sys
from pathlib import Path

import pytest
from helpers import DEMOS, PACKHOUSE, ROOT, read_csv_columns

from policyc.compiler import write_artefact
from policyc.compiler.build import compile_policy

RUNTIME = ROOT / "policyc" / "runtime"

FORBIDDEN = {
    "pydantic",
    "yaml",
    "click",
    "scipy",
    "jsonschema",
    "pyarrow",
    "pandas",
    "polars",
    "sklearn",
    "policyc.language.checks",
    "policyc.compiler.build",
    "policyc.language.model",
    "policyc.language.source",
    "policyc.evidence",
    "policyc.compiler",
    "policyc.evidence.io",
    "policyc.cli",
}

SCRIPT = """
import json, sys
import numpy as np
import policyc.runtime
rule = policyc.runtime.load_rule(sys.argv[1])
row = json.loads(sys.argv[2])
decision = rule.decide(np.array([row]))
print(json.dumps({"decision": int(decision[0]), "modules": sorted(sys.modules)}))
"""


def test_runtime_loads_and_decides_without_compiler_modules(tmp_path: Path) -> None:
    rule = compile_policy(PACKHOUSE).rule
    path = tmp_path / "packhouse.rule"
    write_artefact(rule, path)
    row = read_csv_columns(DEMOS / "packhouse" / "incoming.csv", rule.features)[0]
    result = subprocess.run(
        [sys.executable, "-c", SCRIPT, str(path), json.dumps(row.tolist())],
        capture_output=True,
        text=True,
        check=True,
        cwd=tmp_path,
    )
    report = json.loads(result.stdout)
    assert report["decision"] == int(rule.decide(row[None, :])[0])
    loaded = set(report["modules"])
    assert "policyc.runtime" in loaded and "numpy" in loaded
    imported_forbidden = {m for m in loaded if any(m == f or m.startswith(f + ".") for f in FORBIDDEN)}
    assert imported_forbidden == set()


def imports_of(path: Path) -> list[tuple[str, int]]:
    """Absolute module names imported by a file, with line numbers (relative imports resolved)."""
    package = "policyc.runtime"
    found = []
    for node in ast.walk(ast.parse(path.read_text(encoding="utf-8"))):
        if isinstance(node, ast.Import):
            found.extend((alias.name, node.lineno) for alias in node.names)
        elif isinstance(node, ast.ImportFrom):
            if node.level:
                base = package.rsplit(".", node.level - 1)[0] if node.level > 1 else package
                found.append((f"{base}.{node.module}" if node.module else base, node.lineno))
            else:
                found.append((node.module or "", node.lineno))
    return found


def allowed(module: str) -> bool:
    top = module.split(".")[0]
    return top in {"numpy", *sys.stdlib_module_names} or module.split(".")[:2] == ["policyc", "runtime"]


def test_runtime_sources_import_only_numpy_stdlib_and_runtime() -> None:
    files = sorted(RUNTIME.glob("*.py"))
    assert {f.name for f in files} >= {"__init__.py", "artefact.py", "kernel.py", "rule.py"}
    offending = [
        f"{path.name}:{line}: {module}" for path in files for module, line in imports_of(path) if not allowed(module)
    ]
    assert offending == []


@pytest.mark.parametrize("copied", ["inputs.py", "kernel.py"])
def test_files_copied_into_the_module_import_numpy_the_standard_library_and_each_other_only(copied: str) -> None:
    # The standalone module copies inputs.py and kernel.py verbatim: no other part of the runtime is there.
    modules = {module for module, _ in imports_of(RUNTIME / copied)}
    assert modules - {"numpy", "policyc.runtime.inputs"} <= set(sys.stdlib_module_names)


def test_top_level_package_is_light() -> None:
    result = subprocess.run(
        [sys.executable, "-c", "import json, sys, policyc; print(json.dumps(sorted(sys.modules)))"],
        capture_output=True,
        text=True,
        check=True,
    )
    loaded = set(json.loads(result.stdout))
    assert not {m for m in loaded if m.split(".")[0] in {"pydantic", "yaml", "click", "scipy", "pyarrow"}}
