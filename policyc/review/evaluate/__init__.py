"""``policyc evaluate``: a rule's empirical risk, errors and deferrals on labelled data (computation and rendering)."""

from __future__ import annotations

from policyc.review.evaluate.evaluation import Evaluation, evaluate
from policyc.review.evaluate.render import render_evaluation

__all__ = ["Evaluation", "evaluate", "render_evaluation"]
