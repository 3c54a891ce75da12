"""Evidence supplied by an upstream model: calibrated posteriors, or per-class log-likelihoods."""

from __future__ import annotations

import numpy as np

from policyc.evidence.base import FittedEvidence
from policyc.language.model import LogLikelihoodEvidence, Policy, PosteriorEvidence

__all__ = ["freeze"]


def freeze(policy: Policy) -> FittedEvidence:
    """Kernel parameters for posterior or log-likelihood evidence; nothing is fitted."""
    evidence = policy.evidence
    assert isinstance(evidence, PosteriorEvidence | LogLikelihoodEvidence)
    features = tuple(evidence.columns[name] for name in policy.classes)
    if isinstance(evidence, LogLikelihoodEvidence):
        return FittedEvidence(features, {}, {"kind": "log-likelihood", "columns": dict(evidence.columns)})
    trained = np.array([evidence.trained_priors[name] for name in policy.classes])
    trained = trained / trained.sum()  # within the check's tolerance of 1 already
    params = {
        "log_trained_priors": np.log(trained),
        "sum_tolerance": np.array(evidence.sum_tolerance),
        "renormalise": np.array(1.0 if evidence.renormalise else 0.0),
    }
    description = {
        "kind": "posterior",
        "columns": dict(evidence.columns),
        "trained_priors": dict(zip(policy.classes, trained.tolist(), strict=True)),
        "calibration": evidence.calibration.model_dump() if evidence.calibration else None,
        "sum_tolerance": evidence.sum_tolerance,
        "renormalise": evidence.renormalise,
    }
    return FittedEvidence(features, params, description)
