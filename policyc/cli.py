"""The ``policyc`` command line: argument plumbing and rendering; the work happens in the stages."""

from __future__ import annotations

import json
import sys
from collections.abc import Callable, Iterator
from contextlib import contextmanager
from pathlib import Path
from typing import TYPE_CHECKING, Any

import click

from policyc import __version__

# Each command imports what it needs inside its body: `policyc --help` loads neither numpy, scipy, pyarrow,
# pydantic nor matplotlib (tests/test_startup.py), and `policyc check` loads no pyarrow.
if TYPE_CHECKING:
    from policyc.batch import DecisionCounts
    from policyc.language.checks import CheckReport
    from policyc.language.model import Policy
    from policyc.review.plot import FigureSize
    from policyc.review.shared.loading import LoadedRule
    from policyc.runtime import Rule

__all__ = ["main"]

CAUTION = (
    "Caution: a decision rule is only as good as its evidence model, priors and losses. "
    "Validate it on held-out data before use, and where decisions touch health, safety, "
    "money or access, defer to local regulations and qualified review."
)


EXIT_CODES = """\b
Exit codes:
  0  success (diff: every gate passes)
  1  findings: check errors, warnings with --strict, a failed diff gate;
     and for every command but diff, a policy, data, rule or input that cannot be used
  2  usage errors; for diff, an input it cannot use ("trouble")"""

_FORMAT_KEY = "policyc.format"
_TROUBLE_KEY = "policyc.trouble_exit_code"
DIFF_TROUBLE_EXIT_CODE = 2
"""diff's exit code for an input it cannot use, so CI tells "the change is too big" (1) from "the job is broken"."""


class _Commands(click.Group):
    """The command group that turns every policyc error into its message and exit code, in this one place."""

    def invoke(self, ctx: click.Context) -> Any:
        try:
            return super().invoke(ctx)
        except Exception as error:
            # Whatever raised a PolicycError has imported its module; importing it here would cost
            # `policyc COMMAND --help` numpy.
            family = sys.modules.get("policyc.runtime.errors")
            if family is None or not isinstance(error, family.PolicycError):
                raise
            if ctx.meta.get(_FORMAT_KEY) == "json":
                click.echo(json.dumps(error.as_json(), indent=2), err=True)
            else:
                click.echo(error.as_text(), err=True)
            ctx.exit(ctx.meta.get(_TROUBLE_KEY, error.exit_code))


@click.group(
    cls=_Commands,
    help=f"Compile reviewed Bayes decision policies into frozen rules.\n\n{CAUTION}\n\n{EXIT_CODES}",
    context_settings={"help_option_names": ["-h", "--help"]},
)
@click.version_option(__version__, prog_name="policyc")
def main() -> None:
    pass


# --- options shared by the commands: one spelling and one definition each ------------------------

_QUIET_KEY = "policyc.quiet"
FORMATS = {
    "text": "text for a terminal",
    "markdown": "markdown for a pull-request comment",
    "json": "json for tools (its JSON Schema is in schemas/; errors too are JSON then, on standard error)",
    "yaml": "yaml for pasting into a policy",
}


def _remember_format(ctx: click.Context, param: click.Parameter, value: str) -> str:
    """Errors are presented in the report's format: JSON on standard error when tools read the output."""
    ctx.meta[_FORMAT_KEY] = value
    return value


def format_option(*formats: str) -> Callable[[Callable[..., Any]], Callable[..., Any]]:
    """``--format``: the report's form, the same option on every command that prints a report."""
    return click.option(
        "--format",
        "output_format",
        type=click.Choice(formats),
        default="text",
        show_default=True,
        callback=_remember_format,
        help="; ".join(FORMATS[name] for name in formats) + ".",
    )


def label_option(help: str, required: bool = False) -> Callable[[Callable[..., Any]], Callable[..., Any]]:
    """``--label COL``: the column of true classes, the same spelling on every command that reads one."""
    return click.option("--label", required=required, metavar="COL", help=help)


REPORT_OUTPUT_OPTION = click.option(
    "-o",
    "--output",
    "report_file",
    type=click.Path(dir_okay=False, path_type=Path),
    help="Write the report to this file instead of standard output.",
)


def _remember_quiet(ctx: click.Context, param: click.Parameter, value: bool) -> bool:
    ctx.meta[_QUIET_KEY] = value
    return value


QUIET_OPTION = click.option(
    "-q",
    "--quiet",
    is_flag=True,
    expose_value=False,
    callback=_remember_quiet,
    help="No progress display (it shows only on a terminal anyway).",
)


def _emit_report(text: str, report_file: Path | None) -> None:
    if report_file is None:
        click.echo(text, nl=not text.endswith("\n"))
        return
    from policyc.files import write_bytes_atomically

    write_bytes_atomically(report_file, text.encode("utf-8"))
    click.echo(f"report -> {report_file}", err=True)


@main.command(epilog=CAUTION)
@click.argument("policies", nargs=-1, required=True, type=click.Path(dir_okay=False, path_type=Path))
@format_option("text", "json")
@REPORT_OUTPUT_OPTION
@click.option("--strict", is_flag=True, help="Exit 1 on warnings too.")
@click.option("--show", is_flag=True, help="Also print the loss matrix and where each action wins.")
@click.option(
    "--source/--no-source",
    "show_source",
    default=None,
    help="Print the offending line with a caret (default: on a terminal).",
)
def check(
    policies: tuple[Path, ...],
    output_format: str,
    report_file: Path | None,
    strict: bool,
    show: bool,
    show_source: bool | None,
) -> None:
    """Validate POLICY files and analyse their consistency.

    Exit 0 when clean or warnings only, 1 on errors (with --strict, on warnings too), 2 on usage errors.
    """
    from policyc.language.checks import check_file
    from policyc.language.diagnostics import render_json

    reports = [check_file(path) for path in policies]
    diagnostics = [d for report in reports for d in report.diagnostics]
    if output_format == "json":
        _emit_report(render_json(diagnostics), report_file)
    else:
        source = report_file is None and sys.stdout.isatty() if show_source is None else show_source
        _emit_report("\n".join(_check_text(report, source, show) for report in reports), report_file)
    failed = any(r.has_errors or (strict and r.has_warnings) for r in reports)
    sys.exit(1 if failed else 0)


def _check_text(report: CheckReport, show_source: bool, show: bool) -> str:
    from policyc.language.diagnostics import render_text

    lines = {report.name: report.source_lines} if show_source else {}
    out = [render_text(report.diagnostics, lines, show_source)] if report.diagnostics else []
    counts = {s: sum(d.severity.value == s for d in report.diagnostics) for s in ("error", "warning", "info")}
    verdict = "errors" if counts["error"] else "ok"
    out.append(
        f"{report.name}: {verdict} ({counts['error']} errors, {counts['warning']} warnings, {counts['info']} notes)"
    )
    if show and report.policy is not None:
        out.extend(_policy_tables(report))
    return "\n".join(out)


def _policy_tables(report: CheckReport) -> list[str]:
    from policyc.geometry.reach import ReachabilityError
    from policyc.language.checks import action_regions
    from policyc.render import format_matrix

    policy = report.policy
    assert policy is not None
    try:
        regions = action_regions(policy)
    except ReachabilityError:  # already reported by check as loss-not-analysable
        return []
    if regions is None:
        return []
    unit = f" ({policy.loss_unit})" if policy.loss_unit else ""
    out = [
        f"\nloss{unit}, loss[action][true class]:"
        if policy.loss is not None
        else f"\ngain{unit} as stated, gain[action][true class]:"
    ]
    sign = 1.0 if policy.loss is not None else -1.0
    out.append(format_matrix(sign * policy.loss_matrix(), policy.actions, policy.classes, "action", "true class"))
    if policy.reject is not None:
        value = policy.reject.cost if policy.reject.cost is not None else policy.reject.gain
        out.append(
            f"reject: {policy.reject.action} at {'cost' if policy.reject.cost is not None else 'gain'} {value:g}"
        )
    out.append("\nwhere each choice wins (example posterior at the largest margin):")
    for region in regions:
        posterior = ", ".join(f"{c}={p:.3f}" for c, p in zip(policy.classes, region.example_posterior, strict=True))
        status = f"margin {region.margin:.4g} at ({posterior})" if region.reachable else "never chosen"
        out.append(f"  {region.name}: {status}")
    return out + _stated_limits(policy)


def _stated_limits(policy: Policy) -> list[str]:
    """The limits as stated and the entries of L each multiplier will be added to (compile solves the values)."""
    limits = policy.limits
    if limits is None:
        return []
    count = len(limits.max_share) + len(limits.min_recall)
    out = [
        f"\nlimits, solved by compile on {limits.data} at confidence {limits.confidence:g} "
        f"(each at {1 - (1 - limits.confidence) / max(count, 1):.4g}): the rule decides by L' = L + Σ_j μ_j M_j"
    ]
    for action, share in limits.max_share.items():
        where = "the reject cost" if policy.reject is not None and action == policy.reject.action else f"row {action}"
        out.append(f"  max_share[{action}] ≤ {share:g}: its μ is added to {where}")
    names = [*policy.actions, *([policy.reject.action] if policy.reject is not None else [])]
    for name, recall in limits.min_recall.items():
        entries = ", ".join(
            f"the reject cost when the truth is {name}"
            if policy.reject is not None and a == names[-1]
            else f"loss[{a}][{name}]"
            for a in names
            if a not in recall.actions
        )
        listed = ", ".join(recall.actions)
        out.append(f"  min_recall[{name}] ≥ {recall.share:g} by {listed}: its μ is added to {entries or 'nothing'}")
    return out


@main.command()
def schema() -> None:
    """Print the JSON Schema of the policy language."""
    from policyc.schemas import policy_schema_text

    click.echo(policy_schema_text(), nl=False)


class _ProgressDisplay:
    """Rows processed, on a terminal's stderr: a bar when the total is known, a running count otherwise.

    Each pass over the data (Ledoit-Wolf reads the training file twice) gets its own bar or count, named.
    """

    def __init__(self, label: str, unit: str = "rows") -> None:
        self.label, self.unit = label, unit  # unit: rows, or partitions on a cluster
        self.stage = ""
        self.done = 0
        self.bar: Any = None

    def __call__(self, rows: int, total: int | None, stage: str = "") -> None:
        if stage != self.stage:
            self.close()
            self.stage, self.done, self.bar = stage, 0, None
        self.done += rows
        label = f"{self.label} ({self.stage})" if self.stage else self.label
        if total is not None:
            if self.bar is None:
                self.bar = click.progressbar(length=total, label=label, file=sys.stderr)
            self.bar.update(rows)
        else:
            click.echo(f"\r{label}: {self.done:,} {self.unit}", nl=False, err=True)

    def close(self) -> None:
        if self.bar is not None:
            self.bar.render_finish()
        elif self.done:
            click.echo("", err=True)


@contextmanager
def _progress(label: str) -> Iterator[_ProgressDisplay | None]:
    """A progress display on a terminal; nothing in CI logs or pipes, nor with --quiet."""
    if not sys.stderr.isatty() or click.get_current_context().meta.get(_QUIET_KEY):
        yield None
        return
    display = _ProgressDisplay(label)
    try:
        yield display
    finally:
        display.close()


_SCHEDULER = click.option(
    "--scheduler",
    metavar="ADDRESS|local",
    help="Run over the data's files on a Dask cluster (the dask extra): a scheduler address, "
    "or local to start one on this machine. Results equal a single-process run.",
)
_WORKERS = click.option(
    "--workers", type=click.IntRange(min=1), help="Worker processes of --scheduler local (default: one per core)."
)


@contextmanager
def _partitions(scheduler: str | None, workers: int | None, progress: _ProgressDisplay | None) -> Iterator[Any]:
    """A Dask partition runner when --scheduler is given (progress then counts partitions), else None."""
    if scheduler is None:
        if workers is not None:
            raise click.UsageError("--workers needs --scheduler local")
        yield None
        return
    try:
        from policyc.cluster import DaskPartitions, connect
    except ImportError as error:
        raise click.ClickException(f"--scheduler needs the dask extra: pip install 'policyc[dask]' ({error})") from None
    if progress is not None:
        progress.unit = "partitions"
    with connect(scheduler, workers) as client:
        yield DaskPartitions(client, progress)


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
@QUIET_OPTION
@_SCHEDULER
@_WORKERS
def compile_command(
    policy: Path, rule_file: Path, module_file: Path | None, scheduler: str | None, workers: int | None
) -> None:
    """Check POLICY, fit its evidence model and write the frozen rule."""
    from policyc.compiler import compile_policy, write_artefact, write_module
    from policyc.language.diagnostics import render_text

    with _progress("fitting") as progress, _partitions(scheduler, workers, progress) as partitions:
        compiled = compile_policy(policy, progress, partitions)
    if compiled.diagnostics:
        click.echo(render_text(compiled.diagnostics), err=True)
    digest = write_artefact(compiled.rule, rule_file)
    click.echo(f"compiled {compiled.policy.policy} r{compiled.policy.revision} -> {rule_file} (sha256 {digest})")
    limits = compiled.rule.manifest.get("limits")
    if limits is not None:
        from policyc.render import limits_text

        rule = compiled.rule
        click.echo(limits_text(limits, compiled.policy.loss_unit, rule.actions, rule.classes))
    if module_file is not None:
        write_module(compiled.rule, module_file)
        click.echo(f"standalone module -> {module_file}")


def _decide_partitions(
    rule: Rule,
    rule_file: Path,
    data: Path,
    output: Path,
    explain: bool,
    scheduler: str | None,
    workers: int | None,
    progress: _ProgressDisplay | None,
) -> DecisionCounts:
    from policyc.compiler.artefact import artefact_bytes
    from policyc.partitioned import DecideSettings, decide_partitions, plan_partitions

    partitions = plan_partitions(data, output)
    # the canonical encoding: a rule file's own bytes, or the bytes a policy given as RULE_FILE compiles to
    settings = DecideSettings(artefact_bytes(rule), str(rule_file), explain)
    with _partitions(scheduler, workers, progress) as runner:
        return decide_partitions(settings, partitions, runner, progress)


@main.command(epilog=CAUTION)
@click.argument("rule_file", type=click.Path(dir_okay=False, path_type=Path))
@click.argument("data", type=click.Path(path_type=Path))
@click.option(
    "-o",
    "--output",
    required=True,
    type=click.Path(path_type=Path),
    help="Output file, CSV or Parquet by its suffix; for a directory or glob DATA (or with --scheduler), "
    "a directory that receives one output file per input file, under the same name.",
)
@click.option(
    "--explain",
    is_flag=True,
    help="Also write posteriors, risks, runner-up action, margin and reason (min-risk, invalid).",
)
@QUIET_OPTION
@_SCHEDULER
@_WORKERS
def decide(
    rule_file: Path, data: Path, output: Path, explain: bool, scheduler: str | None, workers: int | None
) -> None:
    """Decide every row of DATA (CSV or Parquet; a file, directory or glob) with RULE_FILE; add an `action` column.

    RULE_FILE may also be a policy file (checked and compiled in memory, nothing written).
    """
    from policyc.batch import decide_file
    from policyc.files import terminate_like_interrupt

    rule = _load_subject(rule_file).rule
    partitioned = scheduler is not None or data.is_dir() or not data.is_file()
    with terminate_like_interrupt(), _progress("deciding") as progress:
        if partitioned:
            counts = _decide_partitions(rule, rule_file, data, output, explain, scheduler, workers, progress)
        else:
            counts = decide_file(rule, data, output, explain, progress)
    click.echo(f"{counts.rows} rows -> {output}: {counts.summary()}")


@main.command(epilog=CAUTION)
@click.argument("rule_file", type=click.Path(dir_okay=False, path_type=Path))
@format_option("text", "json")
@REPORT_OUTPUT_OPTION
def inspect(rule_file: Path, output_format: str, report_file: Path | None) -> None:
    """Show a rule's manifest, hashes, names, priors, loss table and (two classes) posterior thresholds.

    RULE_FILE may also be a policy file (checked and compiled in memory, nothing written).
    """
    from policyc.render import dumps
    from policyc.review.inspect import inspection, render_inspection

    rule = _load_subject(rule_file).rule
    report = inspection(rule)
    _emit_report(dumps(report) if output_format == "json" else render_inspection(rule, report), report_file)


# --- diff, evaluate, plot -----------------------------------------------------------------------
# Their modules are imported inside the commands: `policyc check` need not pay for scipy.stats or matplotlib.

CONFIDENCE_OPTION = click.option(
    "--confidence",
    type=click.FloatRange(0.5, 1.0, min_open=False, max_open=True),
    default=0.95,
    show_default=True,
    help="Two-sided level of bootstrap intervals.",
)
RESAMPLES_OPTION = click.option(
    "--resamples", type=click.IntRange(min=100), default=2000, show_default=True, help="Bootstrap resamples."
)
SEED_OPTION = click.option(
    "--seed",
    type=click.IntRange(min=0),
    default=0,
    show_default=True,
    help="Seed of the random draws (bootstrap resamples, Sobol scrambles).",
)


def _load_subject(path: Path) -> LoadedRule:
    """A policy file (checked and compiled in memory) or a rule file; its warnings on standard error."""
    from policyc.language.diagnostics import render_text
    from policyc.review.shared.loading import load_rule_or_policy

    loaded = load_rule_or_policy(path)
    if loaded.diagnostics:
        click.echo(render_text(loaded.diagnostics), err=True)
    return loaded


def _simplex_samples(ctx: click.Context, param: click.Parameter, value: int) -> int:
    if value < 256 or value & (value - 1):
        raise click.BadParameter("must be a power of two, at least 256 (e.g. 16384)", ctx, param)
    return value


@main.command(name="diff", epilog=CAUTION)
@click.argument("old", type=click.Path(dir_okay=False, path_type=Path))
@click.argument("new", type=click.Path(dir_okay=False, path_type=Path))
@click.option(
    "--data",
    type=click.Path(dir_okay=False, path_type=Path),
    help="Reference CSV/Parquet with the rules' feature columns: flip matrix, reject rates, expected risk.",
)
@label_option("Column of true classes in --data: empirical risk.")
@click.option("--labels", "deprecated_labels", metavar="COL", hidden=True, help="Deprecated spelling of --label.")
@format_option("text", "markdown", "json")
@REPORT_OUTPUT_OPTION
@click.option(
    "--max-flip-rate",
    type=click.FloatRange(0.0, 1.0),
    help="Gate: share of --data rows whose action changes.",
)
@click.option(
    "--max-risk-increase",
    type=float,
    help="Gate: empirical risk increase new - old on --data with --label, by the new loss matrix "
    "(needs labels: under the new model alone the new rule's expected risk can never be higher).",
)
@click.option("--max-reject-rate", type=click.FloatRange(0.0, 1.0), help="Gate: the new rule's reject share on --data.")
@click.option(
    "--max-simplex-change",
    type=click.FloatRange(0.0, 1.0),
    help="Gate, no data needed: share of the probability simplex where the action changes.",
)
@click.option(
    "--simplex-samples",
    type=int,
    default=16384,
    show_default=True,
    callback=_simplex_samples,
    help="Sobol points on the simplex (three or more classes); a power of two.",
)
@CONFIDENCE_OPTION
@RESAMPLES_OPTION
@SEED_OPTION
def diff_command(
    old: Path,
    new: Path,
    data: Path | None,
    label: str | None,
    deprecated_labels: str | None,
    output_format: str,
    report_file: Path | None,
    max_flip_rate: float | None,
    max_risk_increase: float | None,
    max_reject_rate: float | None,
    max_simplex_change: float | None,
    simplex_samples: int,
    confidence: float,
    resamples: int,
    seed: int,
) -> None:
    """What changes from OLD to NEW (each a policy .yaml/.yml or a compiled rule file).

    Reports changed settings (with file:line:col when both are policies), where on the
    probability simplex the chosen action changes, and with --data the decisions that flip
    and what that costs. Exit 0 when every gate passes, 1 when a gate fails, 2 on usage errors
    and on an input it cannot use (a missing file, a policy with errors, unusable data).
    """
    from policyc.review.diff import GateLimits, diff
    from policyc.review.diff.render import render_diff

    click.get_current_context().meta[_TROUBLE_KEY] = DIFF_TROUBLE_EXIT_CODE
    if deprecated_labels is not None:
        if label is not None:
            raise click.UsageError("give --label only (--labels is its old spelling)")
        click.echo("policyc: --labels is deprecated and will go; use --label", err=True)
        label = deprecated_labels
    limits = GateLimits(max_flip_rate, max_risk_increase, max_reject_rate, max_simplex_change)
    if label is not None and data is None:
        raise click.UsageError("--label needs --data")
    if limits.need_data and data is None:
        raise click.UsageError(f"--{', --'.join(limits.need_data)} need(s) --data")
    if max_risk_increase is not None and label is None:
        raise click.UsageError("--max-risk-increase needs --label")
    before, after = _load_subject(old), _load_subject(new)
    report = diff(before, after, data, label, limits, simplex_samples, confidence, resamples, seed)
    _emit_report(render_diff(report, output_format), report_file)
    failed = [gate for gate in report.gates if not gate.passed]
    for gate in failed:
        click.echo(gate.message, err=True)
    sys.exit(1 if failed else 0)


@main.command(epilog=CAUTION)
@click.argument("rule_file", type=click.Path(dir_okay=False, path_type=Path))
@click.argument("labelled_data", type=click.Path(path_type=Path))
@label_option("Column of true classes.", required=True)
@format_option("text", "markdown", "json")
@REPORT_OUTPUT_OPTION
@click.option(
    "--plot-curve",
    type=click.Path(dir_okay=False, path_type=Path),
    help="Also draw the risk-reject curve (.png or .svg; needs matplotlib).",
)
@click.option(
    "--curve-points",
    type=click.IntRange(min=3, max=1001),
    default=41,
    show_default=True,
    help="Reject costs on the curve, evenly from 0 to V (plus the rule's own cost).",
)
@CONFIDENCE_OPTION
@RESAMPLES_OPTION
@SEED_OPTION
@_SCHEDULER
@_WORKERS
def evaluate(
    rule_file: Path,
    labelled_data: Path,
    label: str,
    output_format: str,
    report_file: Path | None,
    plot_curve: Path | None,
    curve_points: int,
    confidence: float,
    resamples: int,
    seed: int,
    scheduler: str | None,
    workers: int | None,
) -> None:
    """Empirical risk, errors, rejects, confusion and the risk-reject curve of RULE_FILE on LABELLED_DATA
    (CSV or Parquet; a file, directory or glob).

    RULE_FILE may also be a policy file (compiled in memory). For posterior evidence the
    report adds a calibration check of the rule's (prior-corrected) posteriors. Exit 0, or 1
    when the rule or the data cannot be used.
    """
    from policyc.review.evaluate.evaluation import evaluate as run_evaluation
    from policyc.review.evaluate.render import render_evaluation

    loaded = _load_subject(rule_file)
    with _partitions(scheduler, workers, None) as runner:
        result = run_evaluation(
            loaded, labelled_data, label, confidence, resamples, seed, curve_points, partitions=runner
        )
    _emit_report(render_evaluation(result, output_format), report_file)
    if plot_curve is not None:
        from policyc.review.plot import risk_reject_curve

        _draw(lambda: risk_reject_curve(result, plot_curve))


def _draw(draw: Callable[[], Path]) -> None:
    written = draw()
    click.echo(f"picture -> {written}", err=True)


def _size(ctx: click.Context, param: click.Parameter, value: str | None) -> FigureSize:
    from policyc.review.plot import DEFAULT_SIZE, PlotError, parse_size

    if value is None:
        return DEFAULT_SIZE
    try:
        return parse_size(value)
    except PlotError as error:
        raise click.BadParameter(str(error), ctx, param) from None


def _holds(ctx: click.Context, param: click.Parameter, values: tuple[str, ...]) -> dict[str, float]:
    held = {}
    for item in values:
        name, sep, number = item.partition("=")
        try:
            if not sep:
                raise ValueError
            held[name.strip()] = float(number)
        except ValueError:
            raise click.BadParameter(f"{item!r} is not FEATURE=NUMBER", ctx, param) from None
    return held


PICTURE_OPTION = click.option(
    "-o",
    "--output",
    "picture",
    required=True,
    type=click.Path(dir_okay=False, path_type=Path),
    help="Picture file, .png or .svg.",
)
SIZE_OPTION = click.option(
    "--size",
    callback=_size,
    help="WxH in inches (8x6, the default) or pixels (1200x900px); raster output at 100 pixels per inch.",
)


@main.group(epilog="Pictures need matplotlib: pip install 'policyc[plot]'.")
def plot() -> None:
    """Draw pictures of rules for review: regions, simplex, curve.

    \b
      policyc plot regions RULE --x FEAT --y FEAT [--hold FEAT=VALUE ...] [--points DATA --label COL] -o FILE
      policyc plot simplex RULE [--compare OLD_RULE_OR_POLICY] -o FILE
      policyc plot curve RULE DATA --label COL -o FILE

    Every RULE may be a rule file or a policy file (compiled in memory). FILE ends in .png or
    .svg; --size WxH sets inches (8x6, the default) or pixels (1200x900px).
    """


@plot.command(name="regions")
@click.argument("rule_file", metavar="RULE", type=click.Path(dir_okay=False, path_type=Path))
@click.option("--x", "x_feature", required=True, metavar="FEAT", help="Feature on the horizontal axis.")
@click.option("--y", "y_feature", required=True, metavar="FEAT", help="Feature on the vertical axis.")
@click.option(
    "--hold",
    multiple=True,
    callback=_holds,
    metavar="FEAT=VALUE",
    help="Value of another feature (repeatable); default: the mean of the class means.",
)
@click.option(
    "--points", type=click.Path(dir_okay=False, path_type=Path), help="CSV/Parquet of labelled points to overlay."
)
@label_option("Class column of --points.")
@PICTURE_OPTION
@SIZE_OPTION
def plot_regions(
    rule_file: Path,
    x_feature: str,
    y_feature: str,
    hold: dict[str, float],
    points: Path | None,
    label: str | None,
    picture: Path,
    size: FigureSize,
) -> None:
    """Decision regions of a gaussian RULE over two features, the others held fixed."""
    from policyc.review.plot import decision_regions

    if (points is None) != (label is None):
        raise click.UsageError("--points and --label go together")
    loaded = _load_subject(rule_file)
    _draw(lambda: decision_regions(loaded, x_feature, y_feature, picture, hold, points, label, size))


@plot.command(name="simplex")
@click.argument("rule_file", metavar="RULE", type=click.Path(dir_okay=False, path_type=Path))
@click.option(
    "--compare",
    type=click.Path(dir_okay=False, path_type=Path),
    help="An older rule or policy: its boundaries are drawn dashed over RULE's regions, changes hatched.",
)
@PICTURE_OPTION
@SIZE_OPTION
def plot_simplex(rule_file: Path, compare: Path | None, picture: Path, size: FigureSize) -> None:
    """Decision regions of a three-class RULE on the posterior simplex (ternary map)."""
    from policyc.review.plot import simplex_map

    loaded = _load_subject(rule_file)
    older = _load_subject(compare) if compare is not None else None
    _draw(lambda: simplex_map(loaded, picture, older, size))


@plot.command(name="curve")
@click.argument("rule_file", metavar="RULE", type=click.Path(dir_okay=False, path_type=Path))
@click.argument("data", type=click.Path(dir_okay=False, path_type=Path))
@label_option("Column of true classes.", required=True)
@PICTURE_OPTION
@SIZE_OPTION
def plot_curve(rule_file: Path, data: Path, label: str, picture: Path, size: FigureSize) -> None:
    """The risk-reject curve of RULE on labelled DATA (Chow's trade-off)."""
    from policyc.review.evaluate.evaluation import evaluate as run_evaluation
    from policyc.review.plot import risk_reject_curve

    loaded = _load_subject(rule_file)
    result = run_evaluation(loaded, data, label)
    _draw(lambda: risk_reject_curve(result, picture, size))


@main.command(epilog=CAUTION)
@click.argument("rule_file", metavar="RULE", type=click.Path(dir_okay=False, path_type=Path))
@click.argument("data", type=click.Path(path_type=Path))
@format_option("text", "yaml", "json")
@REPORT_OUTPUT_OPTION
@click.option(
    "--confidence",
    type=click.FloatRange(0.5, 1.0, max_open=True),
    default=0.95,
    show_default=True,
    help="Two-sided level of the Wald intervals; the change test runs at level 1 - confidence.",
)
@QUIET_OPTION
@_SCHEDULER
@_WORKERS
def priors(
    rule_file: Path,
    data: Path,
    output_format: str,
    report_file: Path | None,
    confidence: float,
    scheduler: str | None,
    workers: int | None,
) -> None:
    """Estimate the class mix of unlabelled DATA (a file, or a directory or glob of files) with RULE (EM,
    Saerens et al. 2002).

    Compares it with the rule's priors and says whether the change test rejects "no change": if
    it does, the rule's decisions may no longer be the cheapest; review the priors before
    recompiling. The text report ends with the `priors:` block to paste into the policy
    (--format yaml prints that block alone). RULE may also be a policy file (compiled in memory).
    """
    from policyc.review.priors import estimate_priors, render_priors

    rule = _load_subject(rule_file).rule
    with _progress("estimating") as progress, _partitions(scheduler, workers, progress) as runner:
        estimate = estimate_priors(rule, data, confidence, progress, runner)
    _emit_report(render_priors(estimate, output_format), report_file)


if __name__ == "__main__":  # pragma: no cover
    main()
