"""Session plumbing: figures that the robustness tests measure, printed in the terminal summary.

CI runs pytest without ``-s``, so a test's own prints are captured; a test that measures figures (cases
tried, refused, accepted) records them with the ``record_figures`` fixture, asserts on them, and they
appear under "policyc robustness figures" at the end of the run.
"""

from __future__ import annotations

from collections.abc import Callable, Mapping

import pytest

_FIGURES = pytest.StashKey[list[tuple[str, dict[str, int]]]]()


@pytest.fixture(scope="session")
def record_figures(pytestconfig: pytest.Config) -> Callable[[str, Mapping[str, int]], None]:
    figures = pytestconfig.stash.setdefault(_FIGURES, [])

    def record(title: str, counts: Mapping[str, int]) -> None:
        figures.append((title, dict(counts)))

    return record


def pytest_terminal_summary(terminalreporter: pytest.TerminalReporter, config: pytest.Config) -> None:
    figures = config.stash.get(_FIGURES, [])
    if figures:
        terminalreporter.section("policyc robustness figures")
        for title, counts in figures:
            terminalreporter.line(f"{title}: " + ", ".join(f"{name} {value}" for name, value in counts.items()))
