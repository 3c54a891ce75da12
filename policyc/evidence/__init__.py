"""Evidence models: from a policy's evidence section (and data) to frozen kernel parameters.

One module per kind; :func:`fit_evidence` dispatches on ``evidence.kind``.
"""

from __future__ import annotations

from pathlib import Path

from policyc.evidence import gaussian, supplied
from policyc.evidence.base import FittedEvidence, Progress
from policyc.evidence.partitions import PartitionRunner
from policyc.language.model import GaussianEvidence, Policy

__all__ = ["FittedEvidence", "PartitionRunner", "Progress", "fit_evidence"]


def fit_evidence(
    policy: Policy,
    base_dir: Path | None,
    progress: Progress | None = None,
    partitions: PartitionRunner | None = None,
) -> FittedEvidence:
    """Fit (gaussian) or freeze (posterior, log-likelihood) the policy's evidence model.

    ``partitions`` runs the per-file statistics of a multi-file training set (default: this process).

    Raises :class:`policyc.evidence.gaussian.FitProblem` or :class:`policyc.evidence.io.DataError`.
    """
    if isinstance(policy.evidence, GaussianEvidence):
        return gaussian.fit(policy, policy.evidence, base_dir, progress, partitions)
    return supplied.freeze(policy, base_dir)
