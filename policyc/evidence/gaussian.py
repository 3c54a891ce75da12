"""Class-conditional Gaussian evidence: streaming sufficient statistics, fit, frozen kernel parameters.

Estimators (docs/math.md has the derivations):

* mean μ_k and covariance Σ_k by maximum likelihood: the divisor is the row count n_k;
* ``tied``: one pooled covariance Σ = Σ_k S_k / n, classes weighted by their counts
  (S_k is the centred scatter of class k);
* ``diagonal``: the diagonal of the per-class ML covariance;
* shrinkage toward the scaled identity on the raw features,
  Σ* = (1 - α) Σ + α (tr Σ / d) I, with α fixed or, for ``auto``, Ledoit & Wolf (2004).
"""

from __future__ import annotations

import threading
from collections.abc import Callable, Iterable, Iterator, Sequence
from dataclasses import dataclass
from functools import partial
from pathlib import Path

import numpy as np
from scipy.linalg import solve_triangular

from policyc.errors import FitProblem
from policyc.evidence.base import FittedEvidence, Progress
from policyc.evidence.io import data_file_list, expected_rows, read_feature_batches
from policyc.evidence.partitions import PartitionRunner, SerialPartitions, add_sums
from policyc.files import data_sha256
from policyc.language.model import GaussianEvidence, Policy

__all__ = [
    "CONDITION_LIMIT",
    "FIT_BATCH_ROWS",
    "FitProblem",
    "GaussianFit",
    "Moments",
    "TrainingColumns",
    "class_moments_of_file",
    "fit",
    "fit_covariances",
    "fourth_moments_of_file",
    "kernel_params",
    "ledoit_wolf_intensity",
    "merge_class_moments",
    "moments_by_class",
    "shrink",
]

FIT_BATCH_ROWS = 16_384
"""Rows read per batch while fitting: smaller than the reader's default, as the fit keeps two copies of a batch
(features by column, then grouped by class) beside the reader's own; same speed, about 100 MB less peak memory
for 32 features than 65 536 rows (tests/benchmarks/bench_fit.py)."""

CONDITION_LIMIT = 1e12
"""Largest accepted eigenvalue ratio of a covariance; beyond it float64 whitening loses most digits
(common practice, no source)."""


@dataclass(frozen=True)
class Moments:
    """Count, mean and centred scatter Σ (x - mean)(x - mean)ᵀ of a set of rows."""

    count: int
    mean: np.ndarray
    scatter: np.ndarray

    @classmethod
    def empty(cls, n_features: int) -> Moments:
        return cls(0, np.zeros(n_features), np.zeros((n_features, n_features)))

    @classmethod
    def of(cls, rows: np.ndarray) -> Moments:
        if rows.shape[0] == 0:
            return cls.empty(rows.shape[1])
        mean = rows.mean(axis=0)
        centred = rows - mean
        return cls(rows.shape[0], mean, centred.T @ centred)

    def merge(self, other: Moments) -> Moments:
        """Combine two disjoint sets (Chan, Golub & LeVeque 1979, pairwise update).

        n = n_a + n_b;  δ = m_b - m_a;  m = m_a + δ n_b / n;  S = S_a + S_b + δδᵀ n_a n_b / n.
        """
        if other.count == 0:
            return self
        if self.count == 0:
            return other
        total = self.count + other.count
        delta = other.mean - self.mean
        mean = self.mean + delta * (other.count / total)
        scatter = self.scatter + other.scatter + np.outer(delta, delta) * (self.count * other.count / total)
        return Moments(total, mean, scatter)

    @property
    def covariance(self) -> np.ndarray:
        """Maximum-likelihood covariance S / n."""
        return self.scatter / self.count


Batch = tuple[np.ndarray, np.ndarray]  # (features (n, d), class codes (n,))


def _split_by_class(rows: np.ndarray, codes: np.ndarray, n_classes: int) -> Iterator[tuple[int, np.ndarray]]:
    """The rows of each class, in their original order, as (n_k, d) views of one fresh array (callers may
    overwrite them).

    One stable sort by class code (a radix sort for 16-bit keys) and one gather, feature by feature on the
    transposed (d, n) layout, which is contiguous when the rows come column-ordered
    (``read_feature_batches(layout="columns")``). Rows coded -1 sort first and are skipped.
    """
    keys = codes.astype(np.int16) if n_classes < 2**15 else codes
    order = np.argsort(keys, kind="stable")
    counts = np.bincount(codes + 1, minlength=n_classes + 1)  # slot 0 counts the skipped rows
    gathered = np.take(rows.T, order[counts[0] :], axis=1)  # (d, n_kept), C-ordered
    ends = np.cumsum(counts[1:])
    for k in range(n_classes):
        if counts[k + 1]:
            yield k, gathered[:, int(ends[k] - counts[k + 1]) : int(ends[k])].T


def _moments_of_block(block: np.ndarray) -> Moments:
    """Moments.of for a block the caller owns: centred in place, saving one copy (same arithmetic)."""
    mean = block.mean(axis=0)
    block -= mean
    return Moments(block.shape[0], mean, block.T @ block)


def moments_by_class(batches: Iterable[Batch], n_classes: int, n_features: int) -> list[Moments]:
    """One pass: per-class moments, merged batch by batch. Memory O(K d²) whatever the row count."""
    moments = [Moments.empty(n_features) for _ in range(n_classes)]
    for rows, codes in batches:
        for k, block in _split_by_class(rows, codes, n_classes):
            moments[k] = moments[k].merge(_moments_of_block(block))
    return moments


def fourth_moments_by_class(batches: Iterable[Batch], means: np.ndarray) -> np.ndarray:
    """Second pass for Ledoit-Wolf: Σ_rows ‖x - μ_k‖⁴ per class k, about the final class means."""
    n_classes = means.shape[0]
    sums = np.zeros(n_classes)
    for rows, codes in batches:
        for k, block in _split_by_class(rows, codes, n_classes):
            block -= means[k]
            squared_norms = np.einsum("ij,ij->i", block, block)
            sums[k] += float(squared_norms @ squared_norms)
    return sums


def ledoit_wolf_intensity(covariance: np.ndarray, count: int, fourth_moment_sum: float) -> float:
    """Shrinkage intensity α = b²/d² of Ledoit & Wolf (2004), J. Multivariate Analysis 88(2), toward (tr S / p) I.

    With S the ML covariance of centred rows x_r and ⟨A, B⟩ = tr(ABᵀ)/p:
    m = tr S / p;  d² = ‖S - mI‖²;  b̄² = n⁻² Σ_r ‖x_r x_rᵀ - S‖² = n⁻² (Σ_r ‖x_r‖⁴ - n ‖S‖²_F) / p;
    b² = min(b̄², d²). The identity Σ_r x_rᵀ S x_r = n ‖S‖²_F gives b̄² from the fourth-moment sum.
    """
    p = covariance.shape[0]
    scale = np.trace(covariance) / p
    d2 = float(np.sum((covariance - scale * np.eye(p)) ** 2)) / p
    if d2 <= 0.0:
        return 0.0
    b2_bar = (fourth_moment_sum - count * float(np.sum(covariance**2))) / (count**2 * p)
    return min(max(b2_bar, 0.0), d2) / d2


def shrink(covariance: np.ndarray, intensity: float) -> np.ndarray:
    """Σ* = (1 - α) Σ + α (tr Σ / p) I  (same target as Ledoit & Wolf 2004)."""
    p = covariance.shape[0]
    return (1.0 - intensity) * covariance + intensity * (np.trace(covariance) / p) * np.eye(p)


@dataclass(frozen=True)
class GaussianFit:
    means: np.ndarray  # (K, d)
    covariances: np.ndarray  # (K, d, d)
    intensities: tuple[float, ...]  # shrinkage intensity per covariance actually used
    counts: tuple[int, ...]


def fit_covariances(
    moments: Sequence[Moments],
    classes: Sequence[str],
    covariance: str,
    shrinkage: str | float,
    fourth_moments: Callable[[np.ndarray], np.ndarray] | None,
) -> GaussianFit:
    """ML covariances of the requested structure and shrinkage; raise FitProblem naming the class.

    ``fourth_moments(means)`` runs the second pass; it is called only for ``shrinkage: auto``.
    """
    _require_rows(moments, classes, covariance, shrinkage)
    means = np.array([m.mean for m in moments])
    counts = tuple(m.count for m in moments)
    fourth = fourth_moments(means) if shrinkage == "auto" and fourth_moments is not None else None
    if covariance == "tied":
        pooled = Moments(sum(counts), np.zeros(means.shape[1]), np.sum([m.scatter for m in moments], axis=0))
        base = [pooled.covariance]
        fourth_sums = [float(fourth.sum())] if fourth is not None else [0.0]
        base_counts = [pooled.count]
    else:
        base = [m.covariance for m in moments]
        fourth_sums = list(fourth) if fourth is not None else [0.0] * len(moments)
        base_counts = list(counts)
    intensities = [
        ledoit_wolf_intensity(S, n, f) if shrinkage == "auto" else (0.0 if shrinkage == "none" else float(shrinkage))
        for S, n, f in zip(base, base_counts, fourth_sums, strict=True)
    ]
    shrunk = [shrink(S, a) for S, a in zip(base, intensities, strict=True)]
    if covariance == "diagonal":
        shrunk = [np.diag(np.diag(S)) for S in shrunk]
    if covariance == "tied":
        shrunk = shrunk * len(moments)
    names = ["pooled (tied)"] if covariance == "tied" else list(classes)
    for name, S in zip(names, shrunk, strict=False):
        _require_well_conditioned(name, S)
    return GaussianFit(means, np.array(shrunk), tuple(intensities), counts)


def _require_rows(moments: Sequence[Moments], classes: Sequence[str], covariance: str, shrinkage: str | float) -> None:
    n_features = moments[0].mean.shape[0]
    for name, m in zip(classes, moments, strict=True):
        if m.count == 0:
            raise FitProblem(
                "class-without-rows", f"class {name!r} has no training rows", path=("evidence", "training")
            )
        needed = n_features + 1 if covariance == "full" and shrinkage == "none" else 2
        if m.count < needed:
            raise FitProblem(
                "too-few-rows",
                f"class {name!r} has {m.count} training rows; a {covariance} covariance of {n_features} "
                f"features needs at least {needed}",
                "add rows, use shrinkage: auto, or covariance: diagonal or tied",
            )


def _require_well_conditioned(name: str, covariance: np.ndarray) -> None:
    eigenvalues = np.linalg.eigvalsh(covariance)
    smallest, largest = float(eigenvalues[0]), float(eigenvalues[-1])
    if largest <= 0.0 or smallest <= largest / CONDITION_LIMIT:
        ratio = "infinite" if smallest <= 0.0 else f"{largest / smallest:.3g}"
        raise FitProblem(
            "singular-covariance",
            f"the covariance of {name!r} is singular or ill-conditioned (eigenvalue ratio {ratio}, "
            f"limit {CONDITION_LIMIT:g}); some feature is constant or a combination of others",
            "use shrinkage: auto (or a number in (0, 1]), covariance: diagonal with shrinkage, or drop the feature",
        )


def kernel_params(fit: GaussianFit) -> dict[str, np.ndarray]:
    """Arrays for the runtime kernel: stacked whitening factors L_k⁻¹, never an inverse of Σ_k itself.

    Σ_k = L_k L_kᵀ (Cholesky); W_k = L_k⁻¹ by a triangular solve; log normaliser
    -Σ_i ln (L_k)_ii - (d/2) ln 2π = -½ ln det Σ_k - (d/2) ln 2π.
    """
    n_classes, n_features = fit.means.shape
    centre = fit.means.mean(axis=0)
    whitening = np.empty((n_classes * n_features, n_features))
    whitened_means = np.empty(n_classes * n_features)
    log_normalisers = np.empty(n_classes)
    identity = np.eye(n_features)
    for k in range(n_classes):
        factor = np.linalg.cholesky(fit.covariances[k])
        inverse_factor = solve_triangular(factor, identity, lower=True)
        block = slice(k * n_features, (k + 1) * n_features)
        whitening[block] = inverse_factor
        whitened_means[block] = inverse_factor @ (fit.means[k] - centre)
        log_normalisers[k] = -np.sum(np.log(np.diag(factor))) - 0.5 * n_features * np.log(2.0 * np.pi)
    return {
        "centre": centre,
        "whitening": whitening,
        "whitened_means": whitened_means,
        "log_normalisers": log_normalisers,
    }


@dataclass(frozen=True)
class TrainingColumns:
    """What a worker needs to read one training file: plain values, cheap to send to another process."""

    features: tuple[str, ...]
    label: str
    classes: tuple[str, ...]
    ignore_unknown_labels: bool


def class_moments_of_file(columns: TrainingColumns, path: str, progress: Progress | None) -> list[Moments]:
    """First pass over one training file: per-class moments (a leaf of the fit's merge tree)."""
    batches = _checked_batches(columns, Path(path), progress)
    return moments_by_class(batches, len(columns.classes), len(columns.features))


def fourth_moments_of_file(
    columns: TrainingColumns, means: np.ndarray, path: str, progress: Progress | None
) -> np.ndarray:
    """Second (Ledoit-Wolf) pass over one training file, about the class means of all files."""
    return fourth_moments_by_class(_checked_batches(columns, Path(path), progress), means)


def merge_class_moments(first: list[Moments], second: list[Moments]) -> list[Moments]:
    """Per-class Chan-Golub-LeVeque merge of two disjoint sets of rows (``first`` before ``second``)."""
    return [a.merge(b) for a, b in zip(first, second, strict=True)]


def _checked_batches(columns: TrainingColumns, path: Path, progress: Progress | None) -> Iterator[Batch]:
    for batch in read_feature_batches(
        path, columns.features, columns.label, FIT_BATCH_ROWS, layout="columns", classes=columns.classes
    ):
        # a NaN or infinity makes the batch's sum non-finite (finite values can overflow it, hence the recheck)
        if not np.isfinite(batch.features.sum()):
            bad = ~np.isfinite(batch.features).all(axis=1)
            if bad.any():
                row = batch.first_row + int(np.flatnonzero(bad)[0])
                raise FitProblem("training-value-not-finite", f"{path}: row {row} has a NaN or infinite feature value")
        codes = batch.class_codes(columns.classes)
        unknown = None if columns.ignore_unknown_labels else batch.first_unknown_label(codes)
        if unknown is not None:
            raise FitProblem(
                "unknown-label",
                f"{path}: column {columns.label!r}, row {unknown[0]}: label {unknown[1]!r} is not a class",
                "fix the data, add the class, or set ignore_unknown_labels: true",
                ("evidence", "training"),
            )
        if progress is not None:
            progress(batch.features.shape[0], None)
        yield batch.features, codes


def fit(
    policy: Policy,
    evidence: GaussianEvidence,
    base_dir: Path | None,
    progress: Progress | None = None,
    partitions: PartitionRunner | None = None,
) -> FittedEvidence:
    """Fit class-conditional Gaussians from the training file(s), streaming each in batches.

    Several files (a directory or glob) are fitted file by file and the statistics merged in the fixed
    tree of :mod:`policyc.evidence.partitions`, by ``partitions`` (default: this process).
    """
    path = Path(evidence.training.data)
    if base_dir is not None and not path.is_absolute():
        path = base_dir / path
    files = data_file_list(path)
    classes = policy.classes
    digest = _DigestInBackground(files)
    if partitions is None:
        passes = 2 if evidence.shrinkage == "auto" else 1  # Ledoit-Wolf reads the data a second time
        partitions = SerialPartitions(progress, expected_rows(files), passes)
    columns = TrainingColumns(
        tuple(evidence.features), evidence.training.label, tuple(classes), evidence.training.ignore_unknown_labels
    )
    moments = partitions.tree_reduce(partial(class_moments_of_file, columns), merge_class_moments, files)
    result = fit_covariances(
        moments,
        classes,
        evidence.covariance,
        evidence.shrinkage,
        lambda means: partitions.tree_reduce(partial(fourth_moments_of_file, columns, means), add_sums, files),
    )
    counts = dict(zip(classes, result.counts, strict=True))
    intensity_names = ["pooled"] if evidence.covariance == "tied" else list(classes)
    description = {
        "kind": "gaussian",
        "covariance": evidence.covariance,
        "shrinkage": evidence.shrinkage,
        "shrinkage_intensity": dict(zip(intensity_names, result.intensities, strict=True)),
        "estimator": "maximum likelihood (divisor n); tied pools class scatter weighted by counts",
        "training_label": evidence.training.label,
    }
    return FittedEvidence(tuple(evidence.features), kernel_params(result), description, counts, digest.result())


class _DigestInBackground:
    """sha256 of the training data (:func:`policyc.files.data_sha256`), computed on a daemon thread while the
    fit reads the same files.

    hashlib releases the GIL while it hashes, so the digest costs little wall time beside the decoding.
    If the fit fails first, the thread finishes on its own (it holds no lock while hashing) and its outcome is dropped.
    """

    def __init__(self, files: list[Path]) -> None:
        self._outcome: list[str | Exception] = []
        self._files = files
        self._thread = threading.Thread(target=self._run, args=(files,), name="policyc-sha256", daemon=True)
        self._thread.start()

    def _run(self, files: list[Path]) -> None:
        try:
            self._outcome.append(data_sha256(files))
        except Exception as exc:  # re-raised by result(), in the caller's thread
            self._outcome.append(exc)

    def result(self) -> str:
        """The digest of the files as they are now, after the fit read them: the background digest when
        they are unchanged since (a ``stat`` each, :func:`policyc.files.file_sha256`), else a new one."""
        self._thread.join()
        outcome = self._outcome[0]
        if isinstance(outcome, Exception):
            raise outcome
        return data_sha256(self._files)
