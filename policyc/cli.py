"""The ``policyc`` command line: argument plumbing and rendering; the work happens in the stages."""

from __future__ import annotations

import json
import sys
from pathlib import Path

import click

from policyc import __version__
from policyc.check import CheckReport, action_regions, check_file
from policyc.diagnostics import PolicyError, render_json, render_text
from policyc.schemas import policy_schema_text
from policyc.tables import format_matrix

__all__ = ["main"]

CAUTION = (
    "Caution: a decision rule is only as good as its evidence model, priors and losses. "
    "Validate it on held-out data before use, and where decisions touch health, safety, "
    "money or access, defer to local regulations and qualified review."
)


@click.group(
    help=f"Compile reviewed Bayes decision policies into frozen rules.\n\n{CAUTION}",
    context_settings={"help_option_names": ["-h", "--help"]},
)
@click.version_option(__version__, prog_name="policyc")
def main() -> None:
    pass


def _fail(error: PolicyError) -> None:
    click.echo(render_text(error.diagnostics), err=True)
    sys.exit(1)


FORMAT_OPTION = click.option(
    "--format",
    "output_format",
    type=click.Choice(["text", "json"]),
    default="text",
    show_default=True,
    help="text: one line per diagnostic; json: a list of diagnostic objects.",
)


@main.command(epilog=CAUTION)
@click.argument("policies", nargs=-1, required=True, type=click.Path(dir_okay=False, path_type=Path))
@FORMAT_OPTION
@click.option("--strict", is_flag=True, help="Exit 1 on warnings too.")
@click.option("--show", is_flag=True, help="Also print the loss matrix and where each action wins.")
@click.option(
    "--source/--no-source",
    "show_source",
    default=None,
    help="Print the offending line with a caret (default: on a terminal).",
)
def check(policies: tuple[Path, ...], output_format: str, strict: bool, show: bool, show_source: bool | None) -> None:
    """Validate POLICY files and analyse their consistency.

    Exit 0 when clean or warnings only, 1 on errors (with --strict, on warnings too).
    """
    reports = [check_file(path) for path in policies]
    diagnostics = [d for report in reports for d in report.diagnostics]
    if output_format == "json":
        click.echo(render_json(diagnostics))
    else:
        source = sys.stdout.isatty() if show_source is None else show_source
        for report in reports:
            _echo_report(report, source, show)
    failed = any(r.has_errors or (strict and r.has_warnings()) for r in reports)
    sys.exit(1 if failed else 0)


def _echo_report(report: CheckReport, show_source: bool, show: bool) -> None:
    lines = {report.name: report.source_lines} if show_source else {}
    if report.diagnostics:
        click.echo(render_text(report.diagnostics, lines, show_source))
    counts = {s: sum(d.severity.value == s for d in report.diagnostics) for s in ("error", "warning", "info")}
    verdict = "errors" if counts["error"] else "ok"
    click.echo(
        f"{report.name}: {verdict} ({counts['error']} errors, {counts['warning']} warnings, {counts['info']} notes)"
    )
    if show and report.policy is not None:
        _echo_policy_tables(report)


def _echo_policy_tables(report: CheckReport) -> None:
    policy = report.policy
    assert policy is not None
    regions = action_regions(policy)
    if regions is None:
        return
    unit = f" ({policy.loss_unit})" if policy.loss_unit else ""
    click.echo(
        f"\nloss{unit}, loss[action][true class]:"
        if policy.loss is not None
        else f"\ngain{unit} as stated, gain[action][true class]:"
    )
    sign = 1.0 if policy.loss is not None else -1.0
    click.echo(format_matrix(sign * policy.loss_matrix(), policy.actions, policy.classes, "action", "true class"))
    if policy.reject is not None:
        value = policy.reject.cost if policy.reject.cost is not None else policy.reject.gain
        click.echo(
            f"reject: {policy.reject.action} at {'cost' if policy.reject.cost is not None else 'gain'} {value:g}"
        )
    click.echo("\nwhere each choice wins (example posterior at the largest margin):")
    for region in regions:
        posterior = ", ".join(f"{c}={p:.3f}" for c, p in zip(policy.classes, region.example_posterior, strict=True))
        status = f"margin {region.margin:.4g} at ({posterior})" if region.reachable else "never chosen"
        click.echo(f"  {region.name}: {status}")


@main.command()
def schema() -> None:
    """Print the JSON Schema of the policy language."""
    click.echo(policy_schema_text(), nl=False)


def _json_dump(value: object) -> str:
    return json.dumps(value, indent=2, sort_keys=True)


if __name__ == "__main__":  # pragma: no cover
    main()
