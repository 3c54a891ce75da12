"""The advice each diagnostic code carries: the "what to do" column of the README's diagnostics table.

A diagnostic created without a hint takes its code's entry here (:class:`policyc.language.diagnostics.Diagnostic`),
so a tool reading JSON never meets a null hint where the README gives one. ``tests/test_docs.py`` holds this table
and the README's to the same text.
"""

from __future__ import annotations

import difflib
from collections.abc import Iterable

__all__ = ["HINTS", "did_you_mean"]

HINTS: dict[str, str] = {
    "policy-unreadable": "check the path",
    "policy-not-a-file": "a policy is read from a regular file",
    "policy-too-large": "a policy is a short reviewed text",
    "too-many-nodes": "split it; check it is the file you meant",
    "nesting-too-deep": "a policy nests a few levels; check the brackets",
    "control-character": "delete it",
    "number-too-large": "write `1e20` if you mean it, or quote a name",
    "policy-not-utf8": "save as UTF-8",
    "policy-empty": "write the policy",
    "policy-not-a-mapping": "the top level is `key: value`",
    "yaml-syntax": "close the bracket",
    "duplicate-key": "keep one",
    "yaml-ambiguous-boolean": "write `true`/`false`, or quote a name",
    "yaml-anchor": "write the values out",
    "yaml-alias": "write the values out",
    "yaml-tag": "drop the tag",
    "yaml-complex-key": "keys are plain names",
    "missing-key": "add the key",
    "unknown-key": "fix the spelling or remove it",
    "expected-number": "unquote the number",
    "expected-integer": "a whole number",
    "expected-text": 'quote it: `"7"`',
    "expected-boolean": "`true` or `false`",
    "expected-mapping": "a mapping keyed by name",
    "expected-list": "`classes: [a, b]`",
    "not-finite": "a finite number",
    "unknown-choice": "one of the listed values",
    "unknown-evidence-kind": "`gaussian`, `posterior` or `log-likelihood`",
    "missing-evidence-kind": "add `kind:`",
    "malformed-text": "identifiers: letters, digits, `_.-`",
    "too-short": "at least one",
    "out-of-range": "a value in range (coverage in (0, 1))",
    "invalid-value": "state exactly one",
    "too-few-classes": "at least two classes",
    "duplicate-class": "names are unique",
    "duplicate-action": "names are unique",
    "reject-name-clash": "a name of its own",
    "prior-missing": "one prior per class",
    "prior-unknown-class": "only classes",
    "prior-out-of-range": "each in [0, 1]",
    "priors-do-not-sum-to-one": "they sum to 1 (±10⁻⁶)",
    "zero-prior": "class b can never be decided",
    "training-priors-need-training-data": "state the priors",
    "loss-missing-action": "one row per action; the reject cost goes under `reject:`",
    "loss-unknown-action": "one row per action; the reject cost goes under `reject:`",
    "loss-missing-class": "one entry per class",
    "loss-unknown-class": "one entry per class",
    "reject-value-mismatch": "same scale as the matrix",
    "invalid-input-needs-reject": "add a reject option or use `error`",
    "dominated-action": "it is never better than another action",
    "unreachable-action": "no posterior makes it the cheapest",
    "reject-never-taken": "a cost below V (printed)",
    "loss-not-analysable": "keep the losses within six orders of magnitude",
    "reject-always-taken": "every input would be deferred",
    "loss-may-be-transposed": "rows are actions, columns classes",
    "duplicate-feature": "unique features",
    "training-data-missing": "paths are relative to the policy",
    "training-data-hash-mismatch": "review the data, update `sha256:`",
    "training-data-unpinned": "pin the printed hash",
    "training-column-missing": "name a column of the file",
    "limit-unknown-action": "name an action (or the reject action) / a class",
    "limit-unknown-class": "name an action (or the reject action) / a class",
    "limit-share-out-of-range": "a share in [0, 1]: 5% is `0.05`",
    "limit-needs-label": "name the reference data's class column",
    "reference-data-missing": "paths are relative to the policy",
    "reference-data-hash-mismatch": "review the data, update `sha256:`",
    "reference-data-unpinned": "pin the printed hash",
    "limit-action-never-chosen": "list actions that can catch the class",
    "reference-data-unusable": "the message names the column and row",
    "limit-infeasible": "relax a limit, lower `confidence:`, or add reference rows",
    "evidence-column-missing": "one column per class",
    "evidence-column-unknown-class": "one column per class",
    "duplicate-column": "one column each",
    "trained-prior-zero": "the correction divides by it",
    "uncalibrated-posterior": "fit a map with `calibrate:`, or record how it was calibrated",
    "trained-priors-missing": "state the upstream training priors",
    "calibrate-with-trained-priors": "drop `trained_priors:` (the calibration data's class mix replaces them)",
    "calibrate-with-calibration-record": "state one: fitted here, or recorded from upstream",
    "regularisation-without-dirichlet": "only `dirichlet` is regularised",
    "calibration-data-missing": "paths are relative to the policy",
    "calibration-data-hash-mismatch": "review the data, update `sha256:`",
    "calibration-data-unpinned": "pin the printed hash",
    "calibration-column-missing": "name a column of the file",
    "calibration-data-unusable": "the message names the column and row",
    "calibration-too-few-rows": "more labelled rows",
    "isotonic-few-rows": "`temperature` or `dirichlet`, or more rows",
    "calibration-not-fitted": "add rows the upstream model gets wrong; `regularisation:` for dirichlet",
    "novelty-needs-gaussian": "novelty needs fitted Gaussian classes",
    "unknown-label": "fix the data or `ignore_unknown_labels: true`",
    "class-without-rows": "add data",
    "too-few-rows": "more rows, shrinkage, or diagonal/tied",
    "singular-covariance": "`shrinkage: auto` or drop the feature",
    "training-value-not-finite": "clean the data",
    "training-data-unusable": "the message names the column and row",
}


def did_you_mean(
    name: str, known: Iterable[str], otherwise: str = "; check its spelling against the policy schema"
) -> str:
    """``"; did you mean 'priors'?"`` for the closest known spellings, else ``otherwise``."""
    close = difflib.get_close_matches(name, sorted(set(known)), n=2, cutoff=0.6)
    if not close:
        return otherwise
    return "; did you mean " + " or ".join(repr(c) for c in close) + "?"
