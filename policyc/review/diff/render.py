"""Rendering a :class:`policyc.review.diff.DiffReport` as text, Markdown (a pull-request comment) or JSON."""

from __future__ import annotations

from collections.abc import Sequence

from policyc.batch import deferral_text
from policyc.render import dumps, markdown_table, number, share, text_table
from policyc.review.diff import DiffReport
from policyc.review.diff.data import DataDiff
from policyc.review.diff.gates import Gate
from policyc.review.diff.posterior import POSTERIOR_SPACE_NOTE, ActionInterval, PosteriorSpaceDiff
from policyc.review.diff.semantic import SemanticChange
from policyc.review.shared.loading import LoadedRule

__all__ = ["render_diff"]


def render_diff(report: DiffReport, output_format: str) -> str:
    """``text``, ``markdown`` or ``json`` (the shape: schemas/diff-report.schema.json)."""
    if output_format == "json":
        return dumps(report)
    if output_format == "markdown":
        return _markdown(report)
    return _text(report)


def _side(loaded: LoadedRule) -> str:
    return f"{loaded.title} ({loaded.kind} {loaded.path})"


def _unit(report: DiffReport) -> str:
    return f" ({report.loss_unit})" if report.loss_unit else ""


def _verdict(report: DiffReport) -> str:
    if not report.gates:
        return "no gates asked for"
    failed = [g.name for g in report.gates if not g.passed]
    if failed:
        return f"FAILED gate(s): {', '.join(failed)}"
    return f"passed ({len(report.gates)} gate{'s' if len(report.gates) > 1 else ''})"


def _change_text(change: SemanticChange) -> str:
    old = change.old if change.old is not None else "(none)"
    new = change.new if change.new is not None else "(none)"
    where = ""
    if change.old_location or change.new_location:
        where = f"  [{change.old_location or '-'} -> {change.new_location or '-'}]"
    return f"{change.what}: {old} -> {new}{where}"


def _intervals_text(intervals: Sequence[ActionInterval]) -> str:
    return "; ".join(f"[{number(i.low, 6)}, {number(i.high, 6)}] {i.action}" for i in intervals)


def _space_lines(space: PosteriorSpaceDiff) -> list[str]:
    if not space.comparable:
        return [f"  not comparable: {space.reason}"]
    lines = [f"  note: {POSTERIOR_SPACE_NOTE}"]
    if space.method == "exact":
        lines += [
            f"  decision by P({space.posterior_of} | x), exact:",
            f"    old: {_intervals_text(space.old_intervals)}",
            f"    new: {_intervals_text(space.new_intervals)}",
        ]
        for m in space.movements:
            lines.append(
                f"    changes on [{number(m.low, 6)}, {number(m.high, 6)}]: {m.old_action} -> {m.new_action} "
                f"(length {number(m.share, 6)})"
            )
        lines.append(f"  share of [0, 1] where the action changes: {number(space.changed_share, 6)} (exact)")
        return lines
    lines.append(
        f"  share of the simplex where the action changes: {share(space.changed_share)} "
        f"± {share(space.standard_error)} (standard error)"
    )
    lines.append(f"  {_sobol_method(space)}")
    if space.movements:
        rows = [[m.old_action, m.new_action, share(m.share), share(m.standard_error)] for m in space.movements]
        lines.append(text_table(["old action", "new action", "share", "std. error"], rows, indent="    "))
    return lines


def _sobol_method(space: PosteriorSpaceDiff) -> str:
    return (
        f"uniform measure on the simplex; {space.samples} scrambled Sobol points in {space.replicates} "
        f"independent scrambles (seed {space.seed}), standard error = sd of the scramble estimates / "
        f"sqrt({space.replicates})"
    )


def _flip_rows(data: DataDiff) -> list[list[str]]:
    return [[name, *(str(int(v)) for v in row)] for name, row in zip(data.old_actions, data.flips, strict=True)]


def _risk_lines(report: DiffReport, data: DataDiff) -> list[str]:
    unit = _unit(report)
    lines = []
    if data.expected_risk is not None:
        old, new, rows = data.expected_risk
        lines.append(
            f"expected risk under the new rule's model{unit}: old decisions {number(old)}, "
            f"new decisions {number(new)}, new - old {number(new - old)} ({rows} rows valid for the new rule)"
        )
    if data.empirical_risk is not None and data.difference is not None:
        old, new, rows = data.empirical_risk
        d = data.difference
        lines.append(
            f"empirical risk with labels {data.label!r}, by the NEW policy's loss matrix{unit}: "
            f"old {number(old)}, new {number(new)}, new - old {number(d.estimate)}, "
            f"{d.confidence:.0%} CI [{number(d.low)}, {number(d.high)}] "
            f"(paired percentile bootstrap, {d.resamples} resamples, seed {d.seed})"
        )
    return lines


def _rates(data: DataDiff) -> str:
    return (
        f"flip rate: {share(data.flip_rate)} ({data.flipped} of {data.rows} rows); "
        f"reject rate: old {share(data.reject_rate_old)}{_by_reason(data.deferred_old)}, "
        f"new {share(data.reject_rate_new)}{_by_reason(data.deferred_new)}"
    )


def _by_reason(deferred: dict[str, int]) -> str:
    return f" ({deferral_text(deferred)})" if deferred else ""


def _text(report: DiffReport) -> str:
    lines = ["policyc diff", f"  old: {_side(report.old)}", f"  new: {_side(report.new)}", ""]
    if report.semantic:
        lines.append(f"semantic changes ({len(report.semantic)}):")
        lines += [f"  {_change_text(c)}" for c in report.semantic]
    else:
        lines.append("semantic changes: none")
    lines += ["", "posterior space:", *_space_lines(report.posterior_space)]
    data = report.data
    if data is not None:
        lines += ["", f"data: {data.source}, {data.rows} rows ({data.invalid_rows} invalid for the new rule)"]
        lines.append("  flips (rows: old action, columns: new action):")
        lines.append(text_table(["old \\ new", *data.new_actions], _flip_rows(data), indent="    "))
        lines.append(f"  {_rates(data)}")
        lines += [f"  {line}" for line in _risk_lines(report, data)]
        lines += [f"  note: {note}" for note in data.notes]
    if report.gates:
        lines += ["", "gates:"]
        lines += [f"  {g.message}" for g in report.gates]
    lines += ["", f"result: {_verdict(report)}"]
    return "\n".join(lines)


def _md_code(value: object) -> str:
    return f"`{value}`" if value is not None else "–"


def _md_identity(report: DiffReport) -> str:
    def short(value: object) -> str:
        return f"`{str(value)[:12]}`" if value else "–"

    rows = [
        ["policy", f"{report.old.title}", f"{report.new.title}"],
        ["source", _md_code(report.old.path), _md_code(report.new.path)],
        ["kind", report.old.kind, report.new.kind],
        [
            "content sha256",
            short(report.old.rule.manifest.get("content_sha256")),
            short(report.new.rule.manifest.get("content_sha256")),
        ],
    ]
    return markdown_table(["", "old", "new"], rows, align="lll")


def _md_semantic(report: DiffReport) -> list[str]:
    if not report.semantic:
        return ["No semantic changes."]
    rows = [
        [
            _md_code(c.what),
            c.change,
            _md_code(c.old),
            _md_code(c.new),
            _md_code(c.old_location),
            _md_code(c.new_location),
        ]
        for c in report.semantic
    ]
    return [markdown_table(["what", "change", "old", "new", "old location", "new location"], rows, align="llllll")]


def _md_space(space: PosteriorSpaceDiff) -> list[str]:
    if not space.comparable:
        return [f"Not comparable: {space.reason}."]
    lines = [f"_Note: {POSTERIOR_SPACE_NOTE}._", ""]
    if space.method == "exact":
        lines.append(f"Decision by P({space.posterior_of} | x), exact intervals:")
        lines.append("")
        rows = [["old", f"[{number(i.low, 6)}, {number(i.high, 6)}]", i.action] for i in space.old_intervals]
        rows += [["new", f"[{number(i.low, 6)}, {number(i.high, 6)}]", i.action] for i in space.new_intervals]
        lines += [markdown_table(["rule", "interval", "action"], rows, align="lll"), ""]
        if space.movements:
            rows = [
                [f"[{number(m.low, 6)}, {number(m.high, 6)}]", m.old_action, m.new_action, number(m.share, 6)]
                for m in space.movements
            ]
            lines += [markdown_table(["changes on", "old action", "new action", "length"], rows, align="lllr"), ""]
        lines.append(f"Share of [0, 1] where the action changes: **{number(space.changed_share, 6)}** (exact).")
        return lines
    lines.append(
        f"Share of the simplex where the action changes: **{share(space.changed_share)}** "
        f"± {share(space.standard_error)} (standard error; {_sobol_method(space)})."
    )
    if space.movements:
        rows = [[m.old_action, m.new_action, share(m.share), share(m.standard_error)] for m in space.movements]
        lines += ["", markdown_table(["old action", "new action", "share", "std. error"], rows, align="llrr")]
    return lines


def _md_data(report: DiffReport, data: DataDiff) -> list[str]:
    lines = [
        f"### Decisions on `{data.source}` ({data.rows} rows, {data.invalid_rows} invalid for the new rule)",
        "",
        "Flips (rows: old action, columns: new action):",
        "",
        markdown_table(["old \\ new", *data.new_actions], _flip_rows(data)),
        "",
        f"- {_rates(data)}",
    ]
    lines += [f"- {line}" for line in _risk_lines(report, data)]
    lines += [f"- note: {note}" for note in data.notes]
    return lines


def _md_gate_result(gate: Gate) -> str:
    if gate.passed:
        return "passed"
    if gate.value is None:
        return "**failed** (not measurable)"
    return f"**failed** (by {number(gate.value - gate.limit)})"


def _md_gates(report: DiffReport) -> list[str]:
    rows = [[_md_code(g.name), g.basis, number(g.limit), number(g.value), _md_gate_result(g)] for g in report.gates]
    return [markdown_table(["gate", "measures", "limit", "value", "result"], rows, align="llrrl")]


def _markdown(report: DiffReport) -> str:
    lines = [
        f"## policyc diff: {report.old.title} → {report.new.title}",
        "",
        f"**Result: {_verdict(report)}**",
        "",
        _md_identity(report),
        "",
        "### Semantic changes",
        "",
        *_md_semantic(report),
        "",
        "### Posterior space",
        "",
        *_md_space(report.posterior_space),
    ]
    if report.data is not None:
        lines += ["", *_md_data(report, report.data)]
    if report.gates:
        lines += ["", "### Gates", "", *_md_gates(report)]
    return "\n".join(lines) + "\n"
