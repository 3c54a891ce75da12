"""Rendering a :class:`policyc.review.evaluate.evaluation.Evaluation` as text, Markdown or JSON."""

from __future__ import annotations

from collections.abc import Callable, Sequence

import numpy as np

from policyc.batch import deferral_text
from policyc.render import dumps, markdown_table, number, share, text_table
from policyc.review.evaluate.evaluation import ECE_WARNING, ERROR_DEFINITION, CalibrationReport, CurvePoint, Evaluation

__all__ = ["render_evaluation"]

Table = Callable[[Sequence[str], Sequence[Sequence[str]]], str]


def render_evaluation(evaluation: Evaluation, output_format: str) -> str:
    """``text``, ``markdown`` or ``json`` (the shape: schemas/evaluation-report.schema.json)."""
    if output_format == "json":
        return dumps(evaluation)
    if output_format == "markdown":
        return _markdown(evaluation)
    return _text(evaluation)


def _unit(evaluation: Evaluation) -> str:
    unit = evaluation.rule.manifest.get("loss_unit")
    return f" {unit}" if unit else ""


def _headline(evaluation: Evaluation) -> list[str]:
    risk = evaluation.risk
    reject = evaluation.rule.reject_action
    return [
        f"risk (mean loss per row): {number(risk.estimate)}{_unit(evaluation)}, {risk.confidence:.0%} CI "
        f"[{number(risk.low)}, {number(risk.high)}] (percentile bootstrap, {risk.resamples} resamples, "
        f"seed {risk.seed}; the rule's stated loss matrix, reject cost included)",
        f"error rate: {share(evaluation.error_rate)} of all rows, {share(evaluation.accepted_error_rate)} "
        f"of accepted rows ({ERROR_DEFINITION})",
        f"reject rate: {share(evaluation.reject_rate)}"
        + (f" ({reject}; {deferral_text(evaluation.deferred)})" if reject else " (no reject option)"),
        f"invalid rows: {evaluation.invalid_rows}",
    ]


def _confusion_rows(evaluation: Evaluation) -> list[list[str]]:
    return [
        [name, *(str(int(v)) for v in row)]
        for name, row in zip(evaluation.rule.classes, evaluation.confusion, strict=True)
    ]


def _per_class_rows(evaluation: Evaluation) -> list[list[str]]:
    rows = []
    for k, name in enumerate(evaluation.rule.classes):
        count = int(evaluation.confusion[k].sum())
        shares = (
            evaluation.confusion[k] / count if count else np.full(len(evaluation.rule.actions), np.nan)
        )  # n[k,a]/n_k
        error = evaluation.errors_by_class[k] / count if count else float("nan")  # errors_k / n_k
        rows.append([name, str(count), *(share(float(s)) for s in shares), share(float(error))])
    return rows


def _shown_points(curve: Sequence[CurvePoint]) -> list[CurvePoint]:
    """About eleven evenly spread points and the rule's own cost; JSON carries all of them."""
    step = max(1, (len(curve) - 1) // 10)
    return [p for i, p in enumerate(curve) if i % step == 0 or p.own or i == len(curve) - 1]


def _curve_rows(evaluation: Evaluation) -> list[list[str]]:
    return [
        [
            number(p.reject_cost) + (" (rule)" if p.own else ""),
            number(p.risk),
            share(p.reject_rate),
            share(p.error_rate),
            share(p.accepted_error_rate),
        ]
        for p in _shown_points(evaluation.curve)
    ]


CURVE_HEADER = ["reject cost", "risk", "reject rate", "error (all rows)", "error (accepted)"]


def _curve_intro(evaluation: Evaluation) -> str:
    return (
        f"risk-reject curve (Chow 1970): reject cost from 0 to V = {number(evaluation.reach_value)}, the largest "
        f"minimum risk over all posteriors; as the cost rises the reject rate falls and errors rise"
    )


def _bin_label(low: float, high: float) -> str:
    # bins are right-closed, the first one closed on both ends
    return f"{'[' if low == 0.0 else '('}{number(low, 2)}, {number(high, 2)}]"


def _calibration_lines(calibration: CalibrationReport, table: Table) -> list[str]:
    lines = [
        "calibration of the rule's posteriors (the upstream probabilities corrected to the deployment priors) "
        "against the labels; per class, one-vs-rest, 10 equal-width bins of P(class | x):",
    ]
    for name, bins, ece in zip(calibration.class_names, calibration.tables, calibration.ece, strict=True):
        lines.append(f"{name}: expected calibration error {number(ece, 3)}")
        rows = [
            [_bin_label(b.low, b.high), str(b.count), number(b.mean_predicted, 3), number(b.observed, 3)] for b in bins
        ]
        lines.append(table(["bin of P", "rows", "mean predicted", "observed"], rows))
    if calibration.warning:
        lines.append(
            f"WARNING: expected calibration error above {ECE_WARNING} (common practice, no source); the costs are "
            "weighed on probabilities that do not match the outcomes: recalibrate upstream or review the priors"
        )
    return lines


LIMITS_HEADER = ["limit", "rows", "rate", "interval", "holds"]


def _limit_rows(evaluation: Evaluation) -> list[list[str]]:
    rows = []
    for check in evaluation.limits:
        if check.kind == "max_share":
            stated = f"at most {share(check.share)} get {check.subject}"
        else:
            stated = f"at least {share(check.share)} of {check.subject} get {' or '.join(check.actions)}"
        verdict = "n/a (no rows)"
        if check.holds is not None:
            verdict = "yes" if check.holds else "NO" if check.clearly_broken else "no, within sampling error"
        rows.append([stated, str(check.rows), share(check.rate), f"[{share(check.low)}, {share(check.high)}]", verdict])
    return rows


def _limits_intro(evaluation: Evaluation) -> str:
    level = evaluation.limits[0].confidence
    return f"operating limits on this data ({level:.0%} two-sided Clopper-Pearson intervals)"


def _text(evaluation: Evaluation) -> str:
    rule = evaluation.rule
    lines = [
        f"policyc evaluate: {evaluation.loaded.title} ({evaluation.loaded.kind} {evaluation.loaded.path}) "
        f"on {evaluation.data}, label {evaluation.label!r}, {evaluation.rows} rows",
        "",
        *_headline(evaluation),
        "",
        "confusion (rows: true class, columns: action):",
        text_table(["true \\ action", *rule.actions], _confusion_rows(evaluation)),
        "",
        "per class (share sent to each action, error rate):",
        text_table(["class", "rows", *rule.actions, "error"], _per_class_rows(evaluation)),
        "",
        _curve_intro(evaluation) + f"; reject cost and risk in{_unit(evaluation) or ' loss units'}:",
        text_table(CURVE_HEADER, _curve_rows(evaluation)),
    ]
    if evaluation.limits:
        lines += ["", _limits_intro(evaluation) + ":", text_table(LIMITS_HEADER, _limit_rows(evaluation))]
    if evaluation.calibration is not None:
        lines += ["", *_calibration_lines(evaluation.calibration, text_table)]
    return "\n".join(lines)


def _markdown(evaluation: Evaluation) -> str:
    rule = evaluation.rule
    lines = [
        f"## policyc evaluate: {evaluation.loaded.title} on `{evaluation.data}`",
        "",
        f"Label column `{evaluation.label}`, {evaluation.rows} rows.",
        "",
        *(f"- {line}" for line in _headline(evaluation)),
        "",
        "### Confusion (rows: true class, columns: action)",
        "",
        markdown_table(["true \\ action", *rule.actions], _confusion_rows(evaluation)),
        "",
        "### Per class (share sent to each action, error rate)",
        "",
        markdown_table(["class", "rows", *rule.actions, "error"], _per_class_rows(evaluation)),
        "",
        "### Risk-reject curve",
        "",
        _curve_intro(evaluation) + f"; reject cost and risk in{_unit(evaluation) or ' loss units'}.",
        "",
        markdown_table(CURVE_HEADER, _curve_rows(evaluation)),
    ]
    if evaluation.limits:
        lines += ["", "### Operating limits", "", _limits_intro(evaluation) + ".", ""]
        lines += [markdown_table(LIMITS_HEADER, _limit_rows(evaluation))]
    if evaluation.calibration is not None:
        lines += ["", "### Calibration", ""]
        for line in _calibration_lines(evaluation.calibration, markdown_table):
            lines += [line, ""]
    return "\n".join(lines).rstrip("\n") + "\n"
