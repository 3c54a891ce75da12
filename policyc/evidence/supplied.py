"""Evidence supplied by an upstream model: posteriors (calibrated upstream, or here), or per-class log-likelihoods."""

from __future__ import annotations

from pathlib import Path
from typing import Any

import numpy as np

from policyc.errors import FitProblem
from policyc.evidence import calibration
from policyc.evidence.base import FittedEvidence
from policyc.evidence.calibration import CALIBRATE_PATH
from policyc.language.model import CalibrationFit, LogLikelihoodEvidence, Policy, PosteriorEvidence

__all__ = ["freeze"]


def freeze(policy: Policy, base_dir: Path | None = None) -> FittedEvidence:
    """Kernel parameters for posterior or log-likelihood evidence; only a ``calibrate:`` map is fitted."""
    evidence = policy.evidence
    assert isinstance(evidence, PosteriorEvidence | LogLikelihoodEvidence)
    features = tuple(evidence.columns[name] for name in policy.classes)
    if isinstance(evidence, LogLikelihoodEvidence):
        return FittedEvidence(features, {}, {"kind": "log-likelihood", "columns": dict(evidence.columns)})
    params: dict[str, np.ndarray] = {}
    sample = None
    if evidence.calibrate is not None:
        sample = _calibration_sample(policy, evidence, evidence.calibrate, base_dir)
        params = calibration.fit_map(evidence.calibrate, sample)
        # calibrated probabilities hold under the calibration data's class mix, which replaces trained_priors
        trained = sample.class_frequencies
    else:
        assert evidence.trained_priors is not None  # the check requires one of the two
        trained = np.array([evidence.trained_priors[name] for name in policy.classes])
        trained = trained / trained.sum()  # within the check's tolerance of 1 already
    params |= {
        "log_trained_priors": np.log(trained),
        "sum_tolerance": np.array(evidence.sum_tolerance),
        "renormalise": np.array(1.0 if evidence.renormalise else 0.0),
    }
    description: dict[str, Any] = {
        "kind": "posterior",
        "columns": dict(evidence.columns),
        "trained_priors": dict(zip(policy.classes, trained.tolist(), strict=True)),
        "calibration": evidence.calibration.model_dump() if evidence.calibration else None,
        "sum_tolerance": evidence.sum_tolerance,
        "renormalise": evidence.renormalise,
    }
    if evidence.calibrate is not None and sample is not None:
        description["calibrate"] = _calibrate_description(policy, evidence.calibrate, sample, params)
    return FittedEvidence(features, params, description, calibration_sample=sample)


def _calibration_sample(
    policy: Policy, evidence: PosteriorEvidence, fit: CalibrationFit, base_dir: Path | None
) -> calibration.CalibrationSample:
    sample = calibration.read_sample(policy, evidence, fit, base_dir)
    needed = fit.minimum_rows_per_class(len(policy.classes))
    for name, count in zip(policy.classes, sample.class_counts, strict=True):
        if count < needed:
            raise FitProblem(
                "calibration-too-few-rows",
                f"calibration data has {count} rows of class {name!r}; method {fit.method} needs at least {needed}",
                path=CALIBRATE_PATH,
            )
    if fit.sha256 is not None and sample.sha256 != fit.sha256:
        raise FitProblem(
            "calibration-data-hash-mismatch",
            f"calibration data changed while compiling: sha256 {sample.sha256}, not the pinned value",
            path=CALIBRATE_PATH,
        )
    return sample


def _calibrate_description(
    policy: Policy, fit: CalibrationFit, sample: calibration.CalibrationSample, params: dict[str, np.ndarray]
) -> dict[str, Any]:
    """What the manifest says about the fitted map (the compiler adds the before/after scores)."""
    described: dict[str, Any] = {
        "method": fit.method,
        "data": fit.data,
        "label": fit.label,
        "data_sha256": sample.sha256,
        "rows": int(sample.codes.size),
        "class_counts": dict(zip(policy.classes, sample.class_counts, strict=True)),
        "floor": calibration.PROBABILITY_FLOOR,
    }
    if fit.method == "temperature":
        described["temperature"] = 1.0 / float(params["calibration_inverse_temperature"])
    elif fit.method == "dirichlet":
        described["regularisation"] = fit.regularisation or 0.0
    else:
        described["points_per_class"] = np.diff(params["calibration_ends"], prepend=0.0).astype(int).tolist()
    return described
