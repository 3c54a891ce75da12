"""The command line's import budget, each case in a fresh interpreter (modelled on click's test_imports).

`policyc --help` must start fast, so every command imports what it needs inside its body; `check` pays for
pydantic and numpy, but not for pyarrow, matplotlib, or scipy while no linear program is needed. The timings
themselves are measured by tests/benchmarks/bench_startup.py, not here.
"""

from __future__ import annotations

import json
import subprocess
import sys

import pytest
from helpers import DEMOS

SCRIPT = """
import json, sys
from policyc.cli import main
try:
    main(sys.argv[1:])
except SystemExit as exit:
    code = exit.code
print(json.dumps({"code": code, "modules": sorted(sys.modules)}))
"""

HEAVY = ("scipy", "pyarrow", "pydantic", "matplotlib")


def loaded_by(*args: str) -> set[str]:
    """Top-level packages in sys.modules after running ``policyc ARGS`` in a fresh interpreter."""
    result = subprocess.run([sys.executable, "-c", SCRIPT, *args], capture_output=True, text=True, check=True)
    report = json.loads(result.stdout.splitlines()[-1])
    assert report["code"] in (0, None), result.stderr
    return {module.split(".")[0] for module in report["modules"]}


@pytest.mark.parametrize(
    "args",
    [["--help"], ["--version"], ["check", "--help"], ["diff", "--help"], ["plot", "simplex", "--help"]],
    ids=" ".join,
)
def test_help_loads_no_heavy_library(args: list[str]) -> None:
    loaded = loaded_by(*args)
    assert loaded.isdisjoint({*HEAVY, "numpy", "yaml"}), sorted(loaded & {*HEAVY, "numpy", "yaml"})


@pytest.mark.parametrize("demo", ["packhouse/policy.yaml", "packhouse/policy-r4.yaml", "claims/policy.yaml"])
def test_check_on_the_demos_loads_no_scipy_pyarrow_or_matplotlib(demo: str) -> None:
    loaded = loaded_by("check", str(DEMOS / demo))
    assert "pydantic" in loaded  # the check really ran
    assert loaded.isdisjoint({"scipy", "pyarrow", "matplotlib"})
