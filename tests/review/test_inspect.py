"""policyc inspect: what a reviewer reads of a compiled rule."""

from __future__ import annotations

import pytest
from helpers import DEMOS, PACKHOUSE
from scipy.stats import chi2

from policyc.compiler.build import compile_policy
from policyc.review.inspect import inspection, render_inspection


def test_inspect_shows_the_novelty_reject_and_its_threshold() -> None:
    rule = compile_policy(DEMOS / "packhouse" / "policy-r5.yaml").rule
    report = inspection(rule)
    assert report.novelty is not None
    # references.md NOV-2: χ²₄⁻¹(0.999) = 18.466827 (scipy.stats.chi2.ppf)
    assert report.novelty["threshold"] == pytest.approx(chi2.ppf(report.novelty["coverage"], 4), rel=1e-12)
    assert report.novelty["threshold"] == pytest.approx(18.466827, abs=1e-6)
    text = render_inspection(rule, report)
    assert "novelty reject" in text and "18.4668" in text and "hold_for_inspector" in text


def test_a_rule_without_novelty_says_nothing_of_it() -> None:
    rule = compile_policy(PACKHOUSE).rule
    report = inspection(rule)
    assert report.novelty is None
    assert "novelty" not in render_inspection(rule, report)
