"""A compiled decision rule: immutable, numpy-only, safe to share between threads."""

from __future__ import annotations

import os
import stat
import threading
from collections.abc import Iterator, Mapping
from contextlib import contextmanager
from dataclasses import dataclass
from functools import lru_cache
from types import MappingProxyType
from typing import TYPE_CHECKING, Any

import numpy as np

from . import inputs, kernel
from .artefact import MAX_RULE_BYTES, decode_rule
from .errors import ArtefactError, InputError

if TYPE_CHECKING:  # numpy.typing costs start-up time and is needed by type checkers only
    from numpy.typing import DTypeLike

__all__ = ["REASONS", "Explanation", "Rule", "load_rule", "rule_from_bytes"]

_MAY_HOLD_MINUS_INFINITY = frozenset({"log_priors", "log_trained_priors"})
"""Logarithms of probabilities: ln 0 = -inf for a class whose prior is zero. Every other array is finite."""

_REQUIRED = {
    "gaussian": ("centre", "whitening", "whitened_means", "log_normalisers"),
    "posterior": ("log_trained_priors", "sum_tolerance", "renormalise"),
    "log-likelihood": (),
}


_CALIBRATION_MAPS: tuple[tuple[str, ...], ...] = (
    ("calibration_inverse_temperature",),
    ("calibration_weights", "calibration_bias"),
    ("calibration_thresholds", "calibration_values", "calibration_ends"),
)


def _calibration_shapes(params: Mapping[str, np.ndarray], n_classes: int, origin: str) -> dict[str, tuple[int, ...]]:
    """Expected shapes of a fitted calibration map's arrays; exactly one map, isotonic pieces that add up."""
    present = [names for names in _CALIBRATION_MAPS if any(n in params for n in names)]
    if len(present) != 1 or any(n not in params for n in present[0]):
        raise ArtefactError(f"{origin}: the calibration map's arrays are incomplete or of more than one method")
    names = present[0]
    if names[0] == "calibration_inverse_temperature":
        return {"calibration_floor": (), names[0]: ()}
    if names[0] == "calibration_weights":
        return {"calibration_floor": (), names[0]: (n_classes, n_classes), names[1]: (n_classes,)}
    ends = params["calibration_ends"]
    points = params["calibration_thresholds"].shape
    if ends.shape != (n_classes,) or not _piece_ends_valid(ends, points[0] if len(points) == 1 else -1):
        raise ArtefactError(f"{origin}: array 'calibration_ends' does not split the isotonic points by class")
    return {"calibration_floor": (), names[0]: points, names[1]: points}


def _piece_ends_valid(ends: np.ndarray, n_points: int) -> bool:
    starts = np.concatenate(([0.0], ends[:-1]))
    return bool(np.all(ends == np.round(ends)) and np.all(ends - starts >= 1) and ends[-1] == n_points)


@dataclass(frozen=True)
class Explanation:
    """Per row: posteriors (n, K), risks (n, A), the chosen and runner-up actions (indices into
    ``Rule.actions`` and names), the risk margin, whether the row was valid input, and the reason for
    the action (an entry of ``REASONS``: ``min-risk``, ``novelty`` or ``invalid``).

    ``margin = risks[runner_up] - risks[action]`` (>= 0); invalid rows hold NaN, index -1 and name None for
    the runner-up. A novelty-deferred row's runner-up is the action of minimum risk, its margin NaN.
    """

    posteriors: np.ndarray
    risks: np.ndarray
    action: np.ndarray
    runner_up: np.ndarray
    margin: np.ndarray
    valid: np.ndarray
    reason: np.ndarray
    action_name: np.ndarray
    runner_up_name: np.ndarray


REASONS = kernel.REASONS


class Rule:
    """A decision rule loaded from an artefact (or built by the compiler).

    ``actions`` lists the policy's actions, then the reject action when there is one.
    """

    def __init__(
        self,
        manifest: Mapping[str, Any],
        params: Mapping[str, np.ndarray],
        origin: str = "<rule>",
        *,
        dtype: DTypeLike = np.float64,
    ) -> None:
        self.manifest: Mapping[str, Any] = MappingProxyType(dict(manifest))
        frozen = {}
        for name, array in params.items():
            copy = np.array(array, dtype=np.float64)
            copy.setflags(write=False)
            frozen[name] = copy
        self._params = frozen
        self.params: Mapping[str, np.ndarray] = MappingProxyType(frozen)
        self.classes: tuple[str, ...] = _names(manifest, "classes", origin)
        self.actions: tuple[str, ...] = _names(manifest, "actions", origin)
        self.features: tuple[str, ...] = _names(manifest, "features", origin)
        self.reject_action: str | None = manifest.get("reject_action")
        evidence = manifest.get("evidence")
        self.evidence: str = evidence.get("kind") if isinstance(evidence, Mapping) else None  # type: ignore[assignment]
        self.invalid_input: str = manifest.get("invalid_input")  # type: ignore[assignment]
        self._validate(origin)
        self.dtype: np.dtype[Any] = _kernel_dtype(dtype)
        self._plan = kernel.plan(self.evidence, self._params, self.dtype.type)

    def astype(self, dtype: DTypeLike) -> Rule:
        """The same rule computing in ``dtype`` (float32 or float64); the artefact's arrays stay float64.

        float32 halves the memory traffic of the kernels: posteriors agree with float64 to about 1e-5, and
        decisions differ only where two risks are within float32 rounding of each other.
        """
        kind = _kernel_dtype(dtype)
        return Rule(self.manifest, self._params, f"<{self!r} as {kind}>", dtype=kind)

    def _validate(self, origin: str) -> None:
        if not isinstance(self.evidence, str) or self.evidence not in _REQUIRED:
            raise ArtefactError(f"{origin}: manifest field 'evidence.kind' is {self.evidence!r:.70}, unknown here")
        if self.invalid_input not in ("reject", "error"):
            raise ArtefactError(f"{origin}: manifest field 'invalid_input' is {self.invalid_input!r:.70}")
        if self.reject_action is not None and self.reject_action != self.actions[-1]:
            raise ArtefactError(f"{origin}: manifest field 'reject_action' must name the last action")
        missing = [n for n in ("log_priors", "loss", *_REQUIRED[self.evidence]) if n not in self.params]
        if missing:
            raise ArtefactError(f"{origin}: arrays {missing} are missing for evidence {self.evidence!r}")
        n_classes, n_actions, n_features = len(self.classes), len(self.actions), len(self.features)
        expected = {"log_priors": (n_classes,), "loss": (n_actions, n_classes)}
        if self.evidence == "gaussian":
            expected |= {
                "centre": (n_features,),
                "whitening": (n_classes * n_features, n_features),
                "whitened_means": (n_classes * n_features,),
                "log_normalisers": (n_classes,),
            }
        elif self.evidence in ("posterior", "log-likelihood") and n_features != n_classes:
            raise ArtefactError(f"{origin}: manifest field 'features' must name one column per class")
        if "novelty_threshold" in self.params:
            if self.evidence != "gaussian" or self.reject_action is None:
                raise ArtefactError(f"{origin}: array 'novelty_threshold' needs gaussian evidence and a reject action")
            expected["novelty_threshold"] = ()
        if self.evidence == "posterior" and "calibration_floor" in self.params:
            expected |= _calibration_shapes(self.params, n_classes, origin)
        for name, shape in expected.items():
            if self.params[name].shape != shape:
                raise ArtefactError(f"{origin}: array {name!r} has shape {self.params[name].shape}, expected {shape}")
        if self.invalid_input == "reject" and self.reject_action is None:
            raise ArtefactError(f"{origin}: manifest field 'invalid_input' is 'reject' but there is no reject action")
        self._validate_values(origin)

    def _validate_values(self, origin: str) -> None:
        """Refuse NaN and infinite parameters: a hash an attacker recomputed must not make a rule decide on NaN."""
        for name, array in self.params.items():
            minus_infinity_allowed = name in _MAY_HOLD_MINUS_INFINITY
            if (
                np.isnan(array).any()
                or np.isposinf(array).any()
                or (np.isneginf(array).any() and not minus_infinity_allowed)
            ):
                raise ArtefactError(f"{origin}: array {name!r} holds NaN or infinite values")
        if not np.isfinite(self.params["log_priors"]).any():
            raise ArtefactError(f"{origin}: array 'log_priors' gives every class a prior of zero")

    def __repr__(self) -> str:
        return (
            f"<Rule {self.manifest.get('policy')} r{self.manifest.get('revision')}: "
            f"{len(self.classes)} classes, {len(self.actions)} actions, evidence {self.evidence}>"
        )

    @property
    def content_sha256(self) -> str | None:
        return self.manifest.get("content_sha256")

    def _evaluate(self, X: object) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
        with _input_refusals():
            return kernel.evaluate(X, self.evidence, self._plan, self.features, self.invalid_input)

    def posteriors(self, X: object) -> np.ndarray:
        """P(class | x), shape (n, K), columns in ``classes`` order; NaN rows are invalid input.

        ``X`` is a 2-D array in ``features`` order, or a table with named columns (a pandas or polars
        DataFrame, a pyarrow Table or RecordBatch, a mapping of column name to 1-D array) whose feature
        columns are selected by name. Missing values make a row invalid.
        """
        return self._evaluate(X)[0]

    def risks(self, X: object) -> np.ndarray:
        """Conditional risks R(a|x), shape (n, A), columns in ``actions`` order (reject last); input as
        for :meth:`posteriors`."""
        return self._evaluate(X)[1]

    def decide(self, X: object, *, threads: int = 1) -> np.ndarray:
        """Index into ``actions`` of the minimum-risk action per row, shape (n,); input as for
        :meth:`posteriors`.

        ``threads``: how many threads share a batch of at least ``PARALLEL_MIN_ROWS`` rows, each taking whole
        chunks, so the decisions do not depend on it. The default 1 already uses every core in numpy's BLAS
        products; more threads pay off when BLAS is pinned to one thread (threadpoolctl), see
        tests/benchmarks/bench_decide.py.
        """
        try:  # not _input_refusals: a context manager costs a microsecond here, a third of a one-row decision
            prepared = inputs.feature_matrix(X, self.features, self.dtype)
        except inputs.InputError as error:
            raise _runtime_input_error(error) from None
        actions, valid = _decide_in_parallel(prepared, self.evidence, self._plan, len(self.actions) - 1, threads)
        if self.invalid_input == "error" and not valid.all():
            raise InputError(kernel.invalid_rows_message(valid, prepared=prepared, features=self.features))
        return actions

    def decide_valid(self, X: object) -> tuple[np.ndarray, np.ndarray]:
        """The action index and validity per row, each shape (n,), without posteriors or risks; invalid rows
        never raise (they get the reject action, or index ``len(actions) - 1``). Input as for :meth:`decide`."""
        with _input_refusals():
            prepared = inputs.feature_matrix(X, self.features, self.dtype)
        return _decide_in_parallel(prepared, self.evidence, self._plan, len(self.actions) - 1, 1)

    def decide_names(self, X: object) -> np.ndarray:
        return np.asarray(self.actions, dtype=object)[self.decide(X)]

    def decide_one(self, record: Mapping[str, float]) -> str:
        """Decide one record given as a mapping of feature name to number (None: a missing value)."""
        try:
            row = inputs.record_row(record, self.features)
        except inputs.InputError as error:
            raise _runtime_input_error(error) from None
        action, valid = kernel.decide_row(row, self.evidence, self._plan, len(self.actions) - 1)
        if not valid and self.invalid_input == "error":
            raise InputError(
                kernel.invalid_rows_message(np.array([False]), prepared=row[None, :], features=self.features)
            )
        return self.actions[action]

    def row_from_record(self, record: Mapping[str, float]) -> np.ndarray:
        """One record as a float64 row in ``features`` order; raise InputError for unknown or missing
        fields and for values that are not numbers."""
        with _input_refusals():
            return inputs.record_row(record, self.features)

    def explain(self, X: object) -> Explanation:
        """Posteriors, risks, chosen action, runner-up, margin and reason per row; invalid rows per
        invalid_input. ``X`` is anything :meth:`decide` takes, or one record mapping like
        :meth:`decide_one`'s (giving a one-row explanation)."""
        prepared = self._matrix(X)
        explanation = self._explain_matrix(prepared)
        if self.invalid_input == "error" and not explanation.valid.all():
            raise InputError(kernel.invalid_rows_message(explanation.valid, prepared=prepared, features=self.features))
        return explanation

    def assess(self, X: object) -> Explanation:
        """Like :meth:`explain`, but invalid rows never raise: they are marked in ``valid`` and sent to reject
        when the policy has a reject option (index ``len(actions) - 1`` otherwise, with NaN risks)."""
        return self._explain_matrix(self._matrix(X))

    def _matrix(self, X: object) -> np.ndarray:
        if inputs.is_record(X):
            return self.row_from_record(X)[None, :]  # type: ignore[arg-type]
        with _input_refusals():
            return inputs.feature_matrix(X, self.features, self.dtype)

    def _explain_matrix(self, prepared: np.ndarray) -> Explanation:
        posteriors, risks, valid, novel = kernel.posteriors_and_risks(prepared, self.evidence, self._plan)
        action = kernel.choose(risks, valid, len(self.actions) - 1, novel)
        n_rows = risks.shape[0]
        runner_up = np.full(n_rows, -1)
        margin = np.full(n_rows, np.nan)
        if len(self.actions) > 1:
            others = np.where(valid[:, None], risks, 0.0)
            others[np.arange(n_rows), action] = np.inf
            second = np.argmin(others, axis=1)
            runner_up = np.where(valid, second, -1)
            # margin = R(runner-up|x) - R(chosen|x) >= 0
            margin = np.where(
                valid & ~novel, others[np.arange(n_rows), second] - risks[np.arange(n_rows), action], np.nan
            )
        names = np.asarray([*self.actions, None], dtype=object)  # index -1 (no runner-up) names None
        return Explanation(
            posteriors,
            risks,
            action,
            runner_up,
            margin,
            valid,
            kernel.reasons(valid, novel),
            names[action],
            names[runner_up],
        )


@contextmanager
def _input_refusals() -> Iterator[None]:
    """The input reader's InputError (numpy-only code, shared with the standalone module) as the runtime's own."""
    try:
        yield
    except inputs.InputError as exc:
        raise _runtime_input_error(exc) from None


PARALLEL_MIN_ROWS = 16 * kernel.CHUNK_ROWS
"""Smaller batches run on the calling thread: starting threads would cost more than it saves."""


def _decide_in_parallel(
    prepared: np.ndarray, evidence: str, plan: dict[str, np.ndarray], invalid_action: int, threads: int
) -> tuple[np.ndarray, np.ndarray]:
    """kernel.decide_matrix over blocks of whole chunks on a thread pool: the same chunks, so the same bits."""
    n_rows = prepared.shape[0]
    if not isinstance(threads, int) or threads < 1:
        raise InputError(f"threads must be a positive number, got {threads!r}")
    chunks = -(-n_rows // kernel.CHUNK_ROWS)  # ⌈n / CHUNK_ROWS⌉
    if threads == 1 or n_rows < PARALLEL_MIN_ROWS:
        return kernel.decide_matrix(prepared, evidence, plan, invalid_action)
    step = -(-chunks // threads) * kernel.CHUNK_ROWS  # whole chunks per block
    actions = np.empty(n_rows, dtype=np.intp)
    valid = np.empty(n_rows, dtype=bool)

    failures: list[BaseException] = []

    def block(start: int) -> None:
        rows = slice(start, start + step)
        try:
            actions[rows], valid[rows] = kernel.decide_rows(prepared[rows], evidence, plan, invalid_action)
        except BaseException as failure:  # re-raised on the calling thread below
            failures.append(failure)

    workers = [threading.Thread(target=block, args=(start,)) for start in range(step, n_rows, step)]
    for worker in workers:
        worker.start()
    block(0)  # the calling thread takes the first block
    for worker in workers:
        worker.join()
    if failures:
        raise failures[0]
    return actions, valid


def _kernel_dtype(dtype: DTypeLike) -> np.dtype[Any]:
    try:
        kind = np.dtype(dtype)
    except (TypeError, ValueError):  # numpy refuses unknown names with either
        kind = np.dtype(np.int8)  # refused below
    if dtype is None or kind not in (np.dtype(np.float32), np.dtype(np.float64)):  # np.dtype(None) is float64
        raise InputError(f"dtype must be float32 or float64, got {dtype!r}")
    return kind


def _runtime_input_error(error: inputs.InputError) -> InputError:
    return error if isinstance(error, InputError) else InputError(str(error))


def load_rule(path: str | os.PathLike[str], *, dtype: DTypeLike = np.float64) -> Rule:
    """Load and verify an artefact; raise ArtefactError (a ValueError) naming what failed.

    ``dtype=np.float32`` computes in single precision (see :meth:`Rule.astype`).

    Only a regular file is read (a FIFO or a device is refused before it is read from), and no more than
    ``MAX_RULE_BYTES`` of it.
    """
    origin = os.fspath(path)
    try:
        descriptor = os.open(path, os.O_RDONLY | getattr(os, "O_NONBLOCK", 0))  # a FIFO opens without blocking
    except OSError as exc:
        raise ArtefactError(f"{origin}: cannot read: {exc.strerror or exc}") from None
    try:
        if not stat.S_ISREG(os.fstat(descriptor).st_mode):
            raise ArtefactError(f"{origin}: not a regular file")
        with os.fdopen(descriptor, "rb", closefd=False) as handle:
            data = handle.read(MAX_RULE_BYTES + 1)
    except OSError as exc:
        raise ArtefactError(f"{origin}: cannot read: {exc.strerror or exc}") from None
    finally:
        os.close(descriptor)
    return rule_from_bytes(data, origin, dtype=dtype)


def rule_from_bytes(data: bytes, origin: str = "<rule bytes>", *, dtype: DTypeLike = np.float64) -> Rule:
    """Verify an artefact's bytes (received over a network, or from a store) and return its Rule."""
    manifest, params = decode_rule(data, origin)
    return Rule(manifest, params, origin, dtype=dtype)


@lru_cache(maxsize=4)
def shared_rule_from_bytes(data: bytes, origin: str = "<rule bytes>") -> Rule:
    """:func:`rule_from_bytes`, once per process for the same bytes: a worker that decides (or reads) partition
    after partition with one rule verifies it once. A Rule never changes, so threads may share it."""
    return rule_from_bytes(data, origin)


def _names(manifest: Mapping[str, Any], field: str, origin: str) -> tuple[str, ...]:
    names = manifest.get(field)
    if not isinstance(names, list | tuple) or not names or not all(isinstance(n, str) and n for n in names):
        raise ArtefactError(f"{origin}: manifest field {field!r} must be a non-empty list of names")
    if len(set(names)) != len(names):
        raise ArtefactError(f"{origin}: manifest field {field!r} repeats a name")
    return tuple(names)
