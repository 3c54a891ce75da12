"""The ``policyc`` command line: argument plumbing and rendering; the work happens in the stages."""

from __future__ import annotations

import json
import sys
from collections.abc import Callable, Iterator
from contextlib import contextmanager
from pathlib import Path
from typing import NoReturn

import click

from policyc import __version__
from policyc.batch import decide_file
from policyc.check import CheckReport, action_regions, check_file
from policyc.compile import compile_policy
from policyc.diagnostics import PolicyError, render_json, render_text
from policyc.emit import write_artefact, write_module
from policyc.inspection import inspection, render_inspection
from policyc.io import DataError, count_rows
from policyc.runtime import ArtefactError, InputError, Rule, load_rule
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


def _fail(error: PolicyError) -> NoReturn:
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


@contextmanager
def _progress(label: str, total: int | None) -> Iterator[Callable[[int], None] | None]:
    """A progress bar on a terminal (stderr); nothing in CI logs or pipes."""
    if not sys.stderr.isatty():
        yield None
        return
    if total is not None:
        with click.progressbar(length=total, label=label, file=sys.stderr) as bar:
            yield bar.update
        return
    done = 0

    def report(rows: int) -> None:
        nonlocal done
        done += rows
        click.echo(f"\r{label}: {done:,} rows", nl=False, err=True)

    yield report
    click.echo("", err=True)


@main.command(name="compile", epilog=CAUTION)
@click.argument("policy", type=click.Path(dir_okay=False, path_type=Path))
@click.option(
    "-o",
    "--output",
    "rule_file",
    required=True,
    type=click.Path(dir_okay=False, path_type=Path),
    help="Where to write the rule artefact.",
)
@click.option(
    "--emit-python",
    "module_file",
    type=click.Path(dir_okay=False, path_type=Path),
    help="Also write a standalone NumPy module with the same decisions.",
)
def compile_command(policy: Path, rule_file: Path, module_file: Path | None) -> None:
    """Check POLICY, fit its evidence model and write the frozen rule."""
    try:
        with _progress("fitting", None) as progress:
            compiled = compile_policy(policy, progress)
    except PolicyError as error:
        _fail(error)
    if compiled.diagnostics:
        click.echo(render_text(compiled.diagnostics), err=True)
    digest = write_artefact(compiled.rule, rule_file)
    click.echo(f"compiled {compiled.policy.policy} r{compiled.policy.revision} -> {rule_file} (sha256 {digest})")
    if module_file is not None:
        write_module(compiled.rule, module_file)
        click.echo(f"standalone module -> {module_file}")


def _load(rule_file: Path) -> Rule:
    try:
        return load_rule(rule_file)
    except ArtefactError as error:
        raise click.ClickException(str(error)) from None


@main.command(epilog=CAUTION)
@click.argument("rule_file", type=click.Path(dir_okay=False, path_type=Path))
@click.argument("data", type=click.Path(dir_okay=False, path_type=Path))
@click.option(
    "-o",
    "--output",
    required=True,
    type=click.Path(dir_okay=False, path_type=Path),
    help="Output file, CSV or Parquet by its suffix.",
)
@click.option("--explain", is_flag=True, help="Also write posteriors, risks, runner-up action and margin.")
def decide(rule_file: Path, data: Path, output: Path, explain: bool) -> None:
    """Decide every row of DATA (CSV or Parquet) with RULE_FILE; add an `action` column."""
    rule = _load(rule_file)
    try:
        with _progress("deciding", count_rows(data) if data.is_file() else None) as progress:
            counts = decide_file(rule, data, output, explain, progress)
    except (DataError, InputError) as error:
        raise click.ClickException(str(error)) from None
    total = sum(counts.values())
    summary = ", ".join(f"{name} {n} ({n / total:.1%})" for name, n in counts.items())
    click.echo(f"{total} rows -> {output}: {summary}")


@main.command(epilog=CAUTION)
@click.argument("rule_file", type=click.Path(dir_okay=False, path_type=Path))
@click.option("--format", "output_format", type=click.Choice(["text", "json"]), default="text", show_default=True)
def inspect(rule_file: Path, output_format: str) -> None:
    """Show a rule's manifest, hashes, names, priors, loss table and (two classes) posterior thresholds."""
    rule = _load(rule_file)
    report = inspection(rule)
    if output_format == "json":
        click.echo(_json_dump(report))
    else:
        click.echo(render_inspection(rule, report))


def _json_dump(value: object) -> str:
    return json.dumps(value, indent=2, sort_keys=True)


if __name__ == "__main__":  # pragma: no cover
    main()
