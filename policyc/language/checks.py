"""Consistency analysis: small rules that each yield diagnostics about one concern.

Every rule has the signature ``rule(policy, context) -> Iterator[Diagnostic]``
and reports paths inside the policy; :func:`check_document` adds the source
positions. ``RULES`` is the ordered registry, so a test can run one rule alone.

Decision-theoretic rules (dominance, reachability, the reject option) work on
the loss matrix λ(a|j) with the reject option as one more row of constant
cost d: R(a|x) = Σ_j λ(a|j) P(j|x), and the rule takes argmin_a R(a|x),
rejecting when min_a R(a|x) > d.
"""

from __future__ import annotations

import csv
from collections import Counter
from collections.abc import Callable, Iterator, Sequence
from dataclasses import dataclass
from pathlib import Path

import numpy as np

from policyc.files import DataFilesError, data_files, data_sha256
from policyc.geometry.reach import (
    ReachabilityError,
    margin_tolerance,
    reject_reach_value,
    winning_margin,
    wins_somewhere,
)
from policyc.language.diagnostics import Diagnostic, PolicyCheckError, PolicyError, Severity
from policyc.language.hints import did_you_mean
from policyc.language.model import GaussianEvidence, Policy, PosteriorEvidence, build_policy
from policyc.language.source import SourceDocument, load_source

__all__ = [
    "ISOTONIC_ADVISED_ROWS_PER_CLASS",
    "PRIOR_SUM_TOLERANCE",
    "RULES",
    "ActionRegion",
    "CheckContext",
    "CheckReport",
    "action_regions",
    "check_document",
    "check_file",
    "label_counts",
    "load_checked_policy",
]

PRIOR_SUM_TOLERANCE = 1e-6
"""|Σ P(j) - 1| allowed; within it, compile renormalises (hand-written decimals rarely sum to 1 exactly)."""


@dataclass(frozen=True)
class CheckContext:
    """What rules may know beyond the policy: where relative paths start."""

    base_dir: Path | None = None

    def resolve(self, relative: str) -> Path:
        path = Path(relative)
        return path if path.is_absolute() or self.base_dir is None else self.base_dir / path


Rule = Callable[[Policy, CheckContext], Iterator[Diagnostic]]


def _error(code: str, message: str, path: tuple[str | int, ...], hint: str | None = None) -> Diagnostic:
    return Diagnostic(code, Severity.ERROR, message, path, hint=hint)


def _warning(code: str, message: str, path: tuple[str | int, ...], hint: str | None = None) -> Diagnostic:
    return Diagnostic(code, Severity.WARNING, message, path, hint=hint)


def _duplicates(names: Sequence[str]) -> list[tuple[int, str]]:
    seen: set[str] = set()
    repeated = []
    for index, name in enumerate(names):
        if name in seen:
            repeated.append((index, name))
        seen.add(name)
    return repeated


# --- names -------------------------------------------------------------------------------------


def classes_are_distinct_and_at_least_two(policy: Policy, context: CheckContext) -> Iterator[Diagnostic]:
    if len(set(policy.classes)) < 2:
        yield _error("too-few-classes", "a decision needs at least two distinct classes", ("classes",))
    for index, name in _duplicates(policy.classes):
        yield _error("duplicate-class", f"class {name!r} is listed twice", ("classes", index))


def actions_are_distinct(policy: Policy, context: CheckContext) -> Iterator[Diagnostic]:
    for index, name in _duplicates(policy.actions):
        yield _error("duplicate-action", f"action {name!r} is listed twice", ("actions", index))


def reject_action_name_is_free(policy: Policy, context: CheckContext) -> Iterator[Diagnostic]:
    if policy.reject is not None and policy.reject.action in policy.actions:
        yield _error(
            "reject-name-clash",
            f"the reject action {policy.reject.action!r} has the name of an action",
            ("reject", "action"),
            "give deferring to a person a name of its own",
        )


# --- priors ------------------------------------------------------------------------------------


def _probability_vector(
    values: dict[str, float], classes: Sequence[str], path: tuple[str | int, ...], what: str
) -> Iterator[Diagnostic]:
    for name in classes:
        if name not in values:
            yield _error("prior-missing", f"{what} has no entry for class {name!r}", path)
    for name, value in values.items():
        if name not in classes:
            yield _error("prior-unknown-class", f"{what} names {name!r}, which is not a class", (*path, name))
        elif not 0.0 <= value <= 1.0:
            yield _error("prior-out-of-range", f"{what} of {name!r} is {value}; it must lie in [0, 1]", (*path, name))
    total = sum(values.values())
    if abs(total - 1.0) > PRIOR_SUM_TOLERANCE:
        yield _error(
            "priors-do-not-sum-to-one",
            f"{what} sum to {total:.10g}; they must sum to 1 within {PRIOR_SUM_TOLERANCE:g}",
            path,
        )


def priors_are_a_distribution(policy: Policy, context: CheckContext) -> Iterator[Diagnostic]:
    if policy.priors == "training":
        if not isinstance(policy.evidence, GaussianEvidence):
            yield _error(
                "training-priors-need-training-data",
                "priors: training takes class frequencies of training data, which this evidence kind has none of",
                ("priors",),
                "state the deployment priors as a mapping of class to probability",
            )
        return
    yield from _probability_vector(policy.priors, policy.classes, ("priors",), "priors")
    for name, value in policy.priors.items():
        if value == 0.0 and name in policy.classes:
            yield _warning(
                "zero-prior",
                f"class {name!r} has prior 0, so its posterior is always 0 and its losses never count",
                ("priors", name),
            )


# --- loss matrix -------------------------------------------------------------------------------


def loss_matrix_names_actions_and_classes(policy: Policy, context: CheckContext) -> Iterator[Diagnostic]:
    key, matrix = policy.matrix_key, policy.stated_matrix
    for action in policy.actions:
        if action not in matrix:
            yield _error("loss-missing-action", f"{key} has no row for action {action!r}", (key,))
    for action, row in matrix.items():
        if action not in policy.actions:
            hint = (
                "the reject cost goes under reject:, not in the matrix"
                if (policy.reject is not None and action == policy.reject.action)
                else None
            )
            yield _error(
                "loss-unknown-action", f"{key} has a row {action!r}, which is not an action", (key, action), hint
            )
            continue
        for name in policy.classes:
            if name not in row:
                yield _error("loss-missing-class", f"{key}[{action}] has no entry for class {name!r}", (key, action))
        for name in row:
            if name not in policy.classes:
                yield _error(
                    "loss-unknown-class", f"{key}[{action}] names {name!r}, which is not a class", (key, action, name)
                )


def _complete_matrix(policy: Policy) -> np.ndarray | None:
    """Loss rows for the actions plus the reject row (d, ..., d), or None if the matrix is incomplete."""
    if any(list(_names_problems(policy))):
        return None
    loss = policy.loss_matrix()
    cost = policy.reject_cost()
    if cost is not None:
        loss = np.vstack([loss, np.full(len(policy.classes), cost)])
    return loss


def _names_problems(policy: Policy) -> Iterator[Diagnostic]:
    yield from classes_are_distinct_and_at_least_two(policy, CheckContext())
    yield from actions_are_distinct(policy, CheckContext())
    yield from loss_matrix_names_actions_and_classes(policy, CheckContext())


def reject_value_matches_matrix(policy: Policy, context: CheckContext) -> Iterator[Diagnostic]:
    if policy.reject is None:
        return
    stated = "cost" if policy.reject.cost is not None else "gain"
    expected = "cost" if policy.loss is not None else "gain"
    if stated != expected:
        yield _error(
            "reject-value-mismatch",
            f"reject states a {stated} but the policy states {policy.matrix_key}:",
            ("reject", stated),
            f"write reject: {{action: ..., {expected}: ...}} so both are on the same scale",
        )


def invalid_input_has_somewhere_to_go(policy: Policy, context: CheckContext) -> Iterator[Diagnostic]:
    if policy.invalid_input == "reject" and policy.reject is None:
        yield _error(
            "invalid-input-needs-reject",
            "invalid_input: reject needs a reject option to send such rows to",
            ("invalid_input",),
            "add reject: {action: ..., cost: ...} or use invalid_input: error",
        )


def _row_name(policy: Policy, row: int) -> str:
    if row < len(policy.actions):
        return policy.actions[row]
    assert policy.reject is not None
    return policy.reject.action


def _dominator(loss: np.ndarray, row: int) -> int | None:
    """A row n that is never worse than ``row`` for any class (Elkan 2001, §1.1, row dominance).

    Equal rows count as dominance of the later row, since ties go to the earlier one.
    """
    for other in range(loss.shape[0]):
        if other == row:
            continue
        never_worse = np.all(loss[other] <= loss[row])
        if never_worse and (np.any(loss[other] < loss[row]) or other < row):
            return other
    return None


def no_dominated_actions(policy: Policy, context: CheckContext) -> Iterator[Diagnostic]:
    loss = _complete_matrix(policy)
    if loss is None:
        return
    for row in range(loss.shape[0]):
        other = _dominator(loss, row)
        if other is None:
            continue
        if row == len(policy.actions):
            yield _warning(
                "reject-never-taken",
                f"action {_row_name(policy, other)!r} never costs more than the reject cost, "
                "so deferring is never chosen",
                ("reject",),
                "lower the reject cost, or drop the reject option",
            )
        else:
            dominated_by = "deferring" if other == len(policy.actions) else f"action {_row_name(policy, other)!r}"
            yield _warning(
                "dominated-action",
                f"action {_row_name(policy, row)!r} is never better than {dominated_by} "
                "for any class, so it is never chosen",
                (policy.matrix_key, policy.actions[row]),
                "check its losses, or remove the action",
            )


@dataclass(frozen=True)
class ActionRegion:
    """Where an action (or the reject option) is the minimum-risk choice."""

    name: str
    margin: float
    example_posterior: tuple[float, ...]

    @property
    def reachable(self) -> bool:
        return self.margin > 0.0


def action_regions(policy: Policy) -> list[ActionRegion] | None:
    """One region per action, reject last; None when the matrix is incomplete."""
    loss = _complete_matrix(policy)
    if loss is None:
        return None
    tolerance = margin_tolerance(loss)
    regions = []
    for row in range(loss.shape[0]):
        margin, posterior = winning_margin(_contenders(loss, row), row)
        regions.append(
            ActionRegion(_row_name(policy, row), margin if margin > tolerance else 0.0, tuple(posterior.tolist()))
        )
    return regions


def _contenders(loss: np.ndarray, row: int) -> np.ndarray:
    """The rows ``row`` competes with, itself still at index ``row``.

    Ties go to the earlier row, so a later identical copy never takes a region from this row.
    """
    keep = [b for b in range(loss.shape[0]) if b <= row or not np.array_equal(loss[b], loss[row])]
    return loss[keep]


LOSS_SPREAD_LIMIT = 1e6
"""Largest max|λ| / min nonzero |λ| (reject cost included) whose reachability is analysed: beyond it risk
differences of the smallest losses fall below the tie tolerance (1e-9 of the largest) and the solver's own
tolerances, so actions would be reported unreachable that are not (common practice, no source)."""


def every_action_is_reachable(policy: Policy, context: CheckContext) -> Iterator[Diagnostic]:
    loss = _complete_matrix(policy)
    if loss is None:
        return
    magnitudes = np.abs(loss[loss != 0.0])
    try:
        if magnitudes.size and magnitudes.max() > LOSS_SPREAD_LIMIT * magnitudes.min():  # no division: no overflow
            raise ReachabilityError(
                f"the losses span {magnitudes.min():g} to {magnitudes.max():g}, more than {LOSS_SPREAD_LIMIT:g} apart"
            )
        findings = list(_unreachable_rows(policy, loss))
    except ReachabilityError as exc:
        yield _warning(
            "loss-not-analysable",
            f"cannot tell which actions are ever chosen: {exc}",
            (policy.matrix_key,),
            "state the losses (and the reject cost) in a unit that keeps them within six orders of magnitude",
        )
        return
    yield from findings


def _unreachable_rows(policy: Policy, loss: np.ndarray) -> Iterator[Diagnostic]:
    """Rows never the minimum-risk choice; a linear program runs only where no witness posterior settles it."""
    tolerance = margin_tolerance(loss)
    for row in range(loss.shape[0]):
        if wins_somewhere(_contenders(loss, row), row, tolerance) or _dominator(loss, row) is not None:
            continue  # dominated rows are reported by no_dominated_actions
        if row == len(policy.actions):
            value = reject_reach_value(loss[:-1])
            yield _warning(
                "reject-never-taken",
                f"the reject cost {loss[-1, 0]:g} is at least V = {value:.6g}, the largest minimum "
                "risk over all posteriors, so deferring is never chosen",
                ("reject",),
                f"a reject cost below {value:.6g} makes deferring possible",
            )
        else:
            yield _warning(
                "unreachable-action",
                f"action {_row_name(policy, row)!r} is not the minimum-risk choice for any posterior",
                (policy.matrix_key, policy.actions[row]),
                "lower its losses where it should win, or remove it",
            )


def reject_is_not_taken_everywhere(policy: Policy, context: CheckContext) -> Iterator[Diagnostic]:
    loss = _complete_matrix(policy)
    if loss is None or policy.reject is None:
        return
    # min_p min_a λ_a·p is reached at a vertex of the simplex (a concave function's minimum).
    floor = float(np.min(loss[:-1]))
    cost = float(loss[-1, 0])
    if cost < floor:
        yield _warning(
            "reject-always-taken",
            f"the reject cost {cost:g} is below every loss ({floor:g} is the smallest), so every input is deferred",
            ("reject",),
        )


def loss_matrix_is_oriented(policy: Policy, context: CheckContext) -> Iterator[Diagnostic]:
    """Actions named like classes: the matching action should be the cheapest for its class."""
    if not set(policy.classes) <= set(policy.actions) or _complete_matrix(policy) is None:
        return
    loss = policy.loss_matrix()
    for column, name in enumerate(policy.classes):
        row = policy.actions.index(name)
        if loss[row, column] > loss[:, column].min():
            cheapest = policy.actions[int(np.argmin(loss[:, column]))]
            yield _warning(
                "loss-may-be-transposed",
                f"when the truth is {name!r}, action {name!r} costs more than {cheapest!r}; "
                f"{policy.matrix_key} is keyed {policy.matrix_key}[action][class]",
                (policy.matrix_key, name, name),
                "if the rows are true classes, swap the keys",
            )


# --- evidence ----------------------------------------------------------------------------------


def features_are_distinct(policy: Policy, context: CheckContext) -> Iterator[Diagnostic]:
    if isinstance(policy.evidence, GaussianEvidence):
        for index, name in _duplicates(policy.evidence.features):
            yield _error("duplicate-feature", f"feature {name!r} is listed twice", ("evidence", "features", index))


def _data_file_is_present_and_pinned(
    context: CheckContext,
    relative: str,
    pin: str | None,
    where: tuple[str, ...],
    what: str,
    many_files: bool = False,
) -> Iterator[Diagnostic]:
    """``what``-data-missing / -unpinned / -hash-mismatch for a data file stated at ``where`` (data, sha256);
    with ``many_files``, a directory or glob of data files too (``policyc.files.data_files``)."""
    path = context.resolve(relative)
    try:
        files = data_files(path) if many_files else ([path] if path.is_file() else [])
        digest = data_sha256(files) if files else None
        problem = "does not exist or is not a regular file"
    except DataFilesError as error:  # a directory or glob without usable data files
        digest, problem = None, f"is unusable: {error}"
    except OSError as exc:  # a name too long for the file system, no permission, ...
        digest, problem = None, f"cannot be read: {exc.strerror}"
    if digest is None:
        yield _error(
            f"{what}-data-missing",
            f"{what} data {_shortened(str(path))!r} {problem}",
            (*where, "data"),
            "paths are relative to the policy file",
        )
        return
    if pin is None:
        yield Diagnostic(
            f"{what}-data-unpinned",
            Severity.INFO,
            f"{what} data is not pinned; its sha256 is {digest}",
            where,
            "add sha256: so a changed file cannot silently change the rule",
        )
    elif digest != pin:
        yield _error(
            f"{what}-data-hash-mismatch",
            f"{what} data {relative!r} has sha256 {digest}, not the pinned value",
            (*where, "sha256"),
            "if the new data is intended, review it and update the pin",
        )


def _shortened(text: str, limit: int = 200) -> str:
    return text if len(text) <= limit else f"{text[: limit // 2]}...{text[-limit // 4 :]}"


def training_data_is_present_and_pinned(policy: Policy, context: CheckContext) -> Iterator[Diagnostic]:
    if not isinstance(policy.evidence, GaussianEvidence):
        return
    training = policy.evidence.training
    yield from _data_file_is_present_and_pinned(
        context, training.data, training.sha256, ("evidence", "training"), "training", many_files=True
    )


def training_file_has_the_columns(policy: Policy, context: CheckContext) -> Iterator[Diagnostic]:
    """The training file's header names the label and every feature (read without fitting anything)."""
    if not isinstance(policy.evidence, GaussianEvidence):
        return
    training = policy.evidence.training
    wanted: dict[tuple[str | int, ...], str] = {
        ("evidence", "features", i): f for i, f in enumerate(policy.evidence.features)
    }
    wanted[("evidence", "training", "label")] = training.label
    yield from _file_has_columns(context, training.data, wanted, ("evidence", "training", "data"), "training")


def calibration_file_has_the_columns(policy: Policy, context: CheckContext) -> Iterator[Diagnostic]:
    """The calibration file's header names the label and every probability column (read without fitting)."""
    evidence = policy.evidence
    if not isinstance(evidence, PosteriorEvidence) or evidence.calibrate is None:
        return
    wanted: dict[tuple[str | int, ...], str] = {("evidence", "columns", c): n for c, n in evidence.columns.items()}
    wanted[("evidence", "calibrate", "label")] = evidence.calibrate.label
    yield from _file_has_columns(
        context, evidence.calibrate.data, wanted, ("evidence", "calibrate", "data"), "calibration"
    )


def _file_has_columns(
    context: CheckContext,
    relative: str,
    wanted: dict[tuple[str | int, ...], str],
    where: tuple[str, ...],
    what: str,
) -> Iterator[Diagnostic]:
    """``what``-column-missing at the key naming each column the file's header lacks."""
    path = context.resolve(relative)
    try:
        if not path.is_file():
            return  # reported by the rule that the file is present
        names = column_names(path)
    except OSError:
        return  # a name the file system refuses: reported by the rule that the file is present
    except ValueError as error:
        yield _error(f"{what}-data-unusable", str(error), where)
        return
    listed = ", ".join(map(repr, names[:30])) + (f" and {len(names) - 30} more" if len(names) > 30 else "")
    for key, column in wanted.items():
        if column not in names:
            suggestion = did_you_mean(column, names, "").removeprefix("; ")
            yield _error(
                f"{what}-column-missing",
                f"{what} data {relative!r} has no column {column!r}{f' ({suggestion})' if suggestion else ''}; "
                f"its columns are {listed}",
                key,
            )


def column_names(path: Path) -> list[str]:
    """The header of a CSV file (standard library) or the schema of a Parquet file; ValueError when unreadable."""
    try:
        if path.suffix.lower() in (".parquet", ".pq"):
            import pyarrow.parquet as pq  # only for Parquet: a CSV header needs no pyarrow

            return list(pq.read_schema(path).names)
        with path.open(newline="", encoding="utf-8-sig") as handle:
            return next(csv.reader(handle), [])
    except (OSError, UnicodeDecodeError, csv.Error) as error:
        raise ValueError(f"{path}: cannot read its header: {error}") from None
    except Exception as error:  # pyarrow's errors, without importing pyarrow to name them
        raise ValueError(f"{path}: cannot read its header: {error}") from None


def evidence_columns_cover_classes(policy: Policy, context: CheckContext) -> Iterator[Diagnostic]:
    evidence = policy.evidence
    if isinstance(evidence, GaussianEvidence):
        return
    columns = evidence.columns
    for name in policy.classes:
        if name not in columns:
            yield _error(
                "evidence-column-missing", f"evidence.columns has no column for class {name!r}", ("evidence", "columns")
            )
    for name in columns:
        if name not in policy.classes:
            yield _error(
                "evidence-column-unknown-class",
                f"evidence.columns names {name!r}, which is not a class",
                ("evidence", "columns", name),
            )
    counts = Counter(columns.values())
    for name, column in columns.items():
        if counts[column] > 1:
            yield _error(
                "duplicate-column", f"column {column!r} is used for more than one class", ("evidence", "columns", name)
            )


def posterior_evidence_is_documented(policy: Policy, context: CheckContext) -> Iterator[Diagnostic]:
    evidence = policy.evidence
    if not isinstance(evidence, PosteriorEvidence):
        return
    if evidence.trained_priors is None:
        if evidence.calibrate is None:
            yield _error(
                "trained-priors-missing",
                "posterior evidence needs the class priors the upstream model was trained under",
                ("evidence",),
                "add trained_priors:, or calibrate: to fit a map whose data's class frequencies take their place",
            )
        return
    yield from _probability_vector(
        evidence.trained_priors, policy.classes, ("evidence", "trained_priors"), "trained priors"
    )
    for name, value in evidence.trained_priors.items():
        if value == 0.0 and name in policy.classes:
            yield _error(
                "trained-prior-zero",
                f"trained prior of {name!r} is 0; the prior correction divides by it",
                ("evidence", "trained_priors", name),
            )
    if evidence.calibration is None and evidence.calibrate is None:
        yield _warning(
            "uncalibrated-posterior",
            "posterior evidence has no calibration record; a cost-derived rule is only right on "
            "calibrated probabilities",
            ("evidence",),
            "add calibrate: {method: temperature, data: ..., label: ...} to fit a map here, or record the upstream "
            "calibration: {method: ..., data_sha256: ..., score: {metric: brier, value: ...}}",
        )


# --- operating limits --------------------------------------------------------------------------


def _decision_names(policy: Policy) -> tuple[str, ...]:
    """The names a limit may use for an action: the actions, then the reject action."""
    return (*policy.actions, *((policy.reject.action,) if policy.reject is not None else ()))


def limits_name_actions_and_classes(policy: Policy, context: CheckContext) -> Iterator[Diagnostic]:
    if policy.limits is None:
        return
    names = _decision_names(policy)
    for action in policy.limits.max_share:
        if action not in names:
            yield _error(
                "limit-unknown-action",
                f"max_share names {action!r}, which is not an action or the reject action",
                ("limits", "max_share", action),
            )
    for name, recall in policy.limits.min_recall.items():
        if name not in policy.classes:
            yield _error(
                "limit-unknown-class",
                f"min_recall names {name!r}, which is not a class",
                ("limits", "min_recall", name),
            )
        for index, action in enumerate(recall.actions):
            if action not in names:
                yield _error(
                    "limit-unknown-action",
                    f"min_recall[{name}] lists {action!r}, which is not an action or the reject action",
                    ("limits", "min_recall", name, "actions", index),
                )


def limit_shares_are_proportions(policy: Policy, context: CheckContext) -> Iterator[Diagnostic]:
    if policy.limits is None:
        return
    shares: list[tuple[tuple[str | int, ...], float]]
    shares = [(("limits", "max_share", a), s) for a, s in policy.limits.max_share.items()]
    shares += [(("limits", "min_recall", c, "share"), r.share) for c, r in policy.limits.min_recall.items()]
    for path, share in shares:
        if not 0.0 <= share <= 1.0:
            yield _error(
                "limit-share-out-of-range", f"a share is {share:g}; it must lie in [0, 1]", path, "write 5% as 0.05"
            )


def recall_limits_have_labels(policy: Policy, context: CheckContext) -> Iterator[Diagnostic]:
    if policy.limits is not None and policy.limits.min_recall and policy.limits.label is None:
        yield _error(
            "limit-needs-label",
            "a min_recall limit needs the true class of each reference row",
            ("limits",),
            "name the class column with label: COLUMN",
        )


def reference_data_is_present_and_pinned(policy: Policy, context: CheckContext) -> Iterator[Diagnostic]:
    if policy.limits is not None:
        yield from _data_file_is_present_and_pinned(
            context, policy.limits.data, policy.limits.sha256, ("limits",), "reference"
        )


def listed_actions_can_be_chosen(policy: Policy, context: CheckContext) -> Iterator[Diagnostic]:
    """A min_recall action is never chosen when another action beats it for every class and every
    adjustment the limits can make raises the other action's losses no more than its own."""
    loss = _complete_matrix(policy)
    if loss is None or policy.limits is None:
        return
    names = _decision_names(policy)
    raised = _raised_entries(policy, names)
    for name, recall in policy.limits.min_recall.items():
        for index, action in enumerate(recall.actions):
            if action not in names:
                continue
            row = names.index(action)
            for other in range(len(names)):
                never_worse = np.all(loss[other] <= loss[row]) and (np.any(loss[other] < loss[row]) or other < row)
                if other != row and never_worse and raised[other] <= raised[row]:
                    yield _error(
                        "limit-action-never-chosen",
                        f"min_recall[{name}] lists {action!r}, which {names[other]!r} beats for every class "
                        "whatever the limits' multipliers, so it is never chosen",
                        ("limits", "min_recall", name, "actions", index),
                        "list the actions that can catch the class",
                    )
                    break


def _raised_entries(policy: Policy, names: Sequence[str]) -> list[set[tuple[str, str]]]:
    """Per decision row, the (limit, class) entries a limit's multiplier adds to (class '*' for the whole row)."""
    assert policy.limits is not None
    raised: list[set[tuple[str, str]]] = [set() for _ in names]
    for action in policy.limits.max_share:
        if action in names:
            raised[names.index(action)].add((f"max_share[{action}]", "*"))
    for name, recall in policy.limits.min_recall.items():
        for row, action in enumerate(names):
            if action not in recall.actions:
                raised[row].add((f"min_recall[{name}]", name))
    return raised


def limits_are_feasible_on_their_face(policy: Policy, context: CheckContext) -> Iterator[Diagnostic]:
    if policy.limits is None:
        return
    names = _decision_names(policy)
    capped = policy.limits.max_share
    for action, share in capped.items():
        if share == 0.0:
            yield _error(
                "limit-infeasible",
                f"max_share[{action}] is 0: no finite multiplier keeps every new row off {action!r}",
                ("limits", "max_share", action),
                "remove the action from the policy instead",
            )
    for name, recall in policy.limits.min_recall.items():
        if recall.share == 1.0:
            yield _error(
                "limit-infeasible",
                f"min_recall[{name}] is 1: no reference sample guarantees that every new {name!r} row is caught",
                ("limits", "min_recall", name, "share"),
                "state a share below 1, e.g. 0.99",
            )
    if all(name in capped for name in names) and sum(capped.values()) < 1.0:
        yield _error(
            "limit-infeasible",
            f"max_share caps every action and sums to {sum(capped.values()):g} < 1, but every row receives one of them",
            ("limits", "max_share"),
            "raise a cap, or leave one action uncapped",
        )


# --- calibration fitted into the rule ------------------------------------------------------------

ISOTONIC_ADVISED_ROWS_PER_CLASS = 1000
"""Below this many calibration rows of a class an isotonic map tends to overfit; Niculescu-Mizil & Caruana
(ICML 2005) found sigmoid fits better than isotonic ones below about a thousand calibration rows (from memory)."""


def calibrate_replaces_trained_priors_and_record(policy: Policy, context: CheckContext) -> Iterator[Diagnostic]:
    evidence = policy.evidence
    if not isinstance(evidence, PosteriorEvidence) or evidence.calibrate is None:
        return
    if evidence.trained_priors is not None:
        yield _error(
            "calibrate-with-trained-priors",
            "calibrate: fits probabilities that hold under the calibration data's class frequencies, "
            "which take the place of trained_priors",
            ("evidence", "trained_priors"),
            "remove trained_priors:",
        )
    if evidence.calibration is not None:
        yield _error(
            "calibrate-with-calibration-record",
            "calibration: records a calibration done upstream, calibrate: fits one here; state one of them",
            ("evidence", "calibration"),
        )


def regularisation_is_for_dirichlet(policy: Policy, context: CheckContext) -> Iterator[Diagnostic]:
    evidence = policy.evidence
    if not isinstance(evidence, PosteriorEvidence) or evidence.calibrate is None:
        return
    if evidence.calibrate.regularisation is not None and evidence.calibrate.method != "dirichlet":
        yield _error(
            "regularisation-without-dirichlet",
            f"regularisation: applies to method: dirichlet only, not {evidence.calibrate.method}",
            ("evidence", "calibrate", "regularisation"),
            "remove regularisation:, or use method: dirichlet",
        )


def calibration_data_is_present_and_pinned(policy: Policy, context: CheckContext) -> Iterator[Diagnostic]:
    evidence = policy.evidence
    if isinstance(evidence, PosteriorEvidence) and evidence.calibrate is not None:
        yield from _data_file_is_present_and_pinned(
            context, evidence.calibrate.data, evidence.calibrate.sha256, ("evidence", "calibrate"), "calibration"
        )


def calibration_data_has_enough_rows(policy: Policy, context: CheckContext) -> Iterator[Diagnostic]:
    evidence = policy.evidence
    if not isinstance(evidence, PosteriorEvidence) or evidence.calibrate is None:
        return
    fit = evidence.calibrate
    path = context.resolve(fit.data)
    try:
        counts = label_counts(path, fit.label) if path.is_file() else None
    except OSError:  # a name too long for the file system, no permission, ...
        counts = None
    except ValueError as error:
        yield _error("calibration-data-unusable", str(error), ("evidence", "calibrate", "data"))
        return
    if counts is None:
        return  # reported by calibration_data_is_present_and_pinned
    needed = fit.minimum_rows_per_class(len(policy.classes))
    for name in policy.classes:
        if counts[name] < needed:
            yield _error(
                "calibration-too-few-rows",
                f"calibration data has {counts[name]} rows of class {name!r}; method {fit.method} needs at least "
                f"{needed} per class",
                ("evidence", "calibrate", "data"),
                "add labelled rows of that class",
            )
        elif fit.method == "isotonic" and counts[name] < ISOTONIC_ADVISED_ROWS_PER_CLASS:
            yield _warning(
                "isotonic-few-rows",
                f"calibration data has {counts[name]} rows of class {name!r}; an isotonic map on fewer than "
                f"{ISOTONIC_ADVISED_ROWS_PER_CLASS} rows per class tends to overfit",
                ("evidence", "calibrate", "method"),
                "use method: temperature or dirichlet, or add rows",
            )


def label_counts(path: Path, label: str) -> Counter[str]:
    """How often each label occurs in one column of a CSV or Parquet file; ValueError when unreadable."""
    import pyarrow as pa
    import pyarrow.csv as pacsv
    import pyarrow.parquet as pq

    try:
        if path.suffix.lower() in (".parquet", ".pq"):
            column = pq.read_table(path, columns=[label]).column(label)
        else:
            options = pacsv.ConvertOptions(include_columns=[label], column_types={label: pa.string()})
            column = pacsv.read_csv(path, convert_options=options).column(label)
    except (pa.ArrowException, OSError, KeyError) as error:
        raise ValueError(f"{path}: cannot read column {label!r}: {error}") from None
    return Counter(str(value) for value in column.to_pylist())


# --- novelty reject ------------------------------------------------------------------------------


def novelty_has_gaussian_evidence(policy: Policy, context: CheckContext) -> Iterator[Diagnostic]:
    if policy.reject is None or policy.reject.novelty is None or isinstance(policy.evidence, GaussianEvidence):
        return
    yield _error(
        "novelty-needs-gaussian",
        f"novelty rejection measures distances to fitted Gaussian classes; evidence {policy.evidence.kind!r} has none",
        ("reject", "novelty"),
        "remove novelty:, or use evidence kind: gaussian",
    )


RULES: tuple[Rule, ...] = (
    classes_are_distinct_and_at_least_two,
    actions_are_distinct,
    reject_action_name_is_free,
    priors_are_a_distribution,
    loss_matrix_names_actions_and_classes,
    reject_value_matches_matrix,
    invalid_input_has_somewhere_to_go,
    no_dominated_actions,
    every_action_is_reachable,
    reject_is_not_taken_everywhere,
    loss_matrix_is_oriented,
    features_are_distinct,
    training_data_is_present_and_pinned,
    training_file_has_the_columns,
    evidence_columns_cover_classes,
    posterior_evidence_is_documented,
    limits_name_actions_and_classes,
    limit_shares_are_proportions,
    recall_limits_have_labels,
    reference_data_is_present_and_pinned,
    listed_actions_can_be_chosen,
    limits_are_feasible_on_their_face,
    calibrate_replaces_trained_priors_and_record,
    regularisation_is_for_dirichlet,
    calibration_data_is_present_and_pinned,
    calibration_file_has_the_columns,
    calibration_data_has_enough_rows,
    novelty_has_gaussian_evidence,
)


# --- driver ------------------------------------------------------------------------------------


@dataclass(frozen=True)
class CheckReport:
    """The outcome of checking one policy file."""

    name: str
    document: SourceDocument | None
    policy: Policy | None
    diagnostics: tuple[Diagnostic, ...]

    @property
    def source_lines(self) -> list[str]:
        """The policy's lines, for excerpts; read leniently when strict loading failed."""
        if self.document is not None:
            return self.document.lines
        try:
            return Path(self.name).read_text(encoding="utf-8", errors="replace").splitlines()
        except OSError:
            return []

    @property
    def has_errors(self) -> bool:
        return any(d.is_error for d in self.diagnostics)

    @property
    def has_warnings(self) -> bool:
        return any(d.severity is Severity.WARNING for d in self.diagnostics)


def run_rules(
    policy: Policy, context: CheckContext, rules: Sequence[Rule] = RULES, fail_fast: bool = False
) -> list[Diagnostic]:
    found: list[Diagnostic] = []
    for rule in rules:
        for diagnostic in rule(policy, context):
            found.append(diagnostic)
            if fail_fast and diagnostic.is_error:
                return found
    return found


def check_document(document: SourceDocument, rules: Sequence[Rule] = RULES, fail_fast: bool = False) -> CheckReport:
    try:
        policy = build_policy(document)
    except PolicyError as exc:
        return CheckReport(document.name, document, None, _in_source_order(exc.diagnostics))
    context = CheckContext(document.base_dir)
    diagnostics = [document.locate(d) for d in run_rules(policy, context, rules, fail_fast)]
    return CheckReport(document.name, document, policy, _in_source_order(diagnostics))


def _in_source_order(diagnostics: Sequence[Diagnostic]) -> tuple[Diagnostic, ...]:
    return tuple(sorted(diagnostics, key=lambda d: (d.line or 0, d.col or 0)))


def check_file(path: str | Path, fail_fast: bool = False) -> CheckReport:
    try:
        document = load_source(path)
    except PolicyError as exc:
        return CheckReport(str(path), None, None, exc.diagnostics)
    return check_document(document, fail_fast=fail_fast)


def load_checked_policy(path: str | Path) -> tuple[SourceDocument, Policy, tuple[Diagnostic, ...]]:
    """Load, validate and check; raise the first stage's PolicyError when anything is an error."""
    document = load_source(path)
    policy = build_policy(document)
    report = check_document(document)
    if report.has_errors:
        raise PolicyCheckError([d for d in report.diagnostics if d.is_error])
    return document, policy, report.diagnostics
