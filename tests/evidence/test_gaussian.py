"""Gaussian evidence: streaming moments, covariance estimators, shrinkage, the compiled log-density, data errors.

Every expected value comes from outside policyc: scipy's multivariate normal, scikit-learn's
discriminant estimators and covariance shrinkage, numpy's covariance, and datasets shipped
inside the scikit-learn wheel. The reference ids (MV-1, LW-1, SK-6, ...) point into
/work/shared/references.md.
"""

from __future__ import annotations

import functools
import json
import math
import re
from collections.abc import Sequence
from pathlib import Path
from typing import Any

import numpy as np
import pyarrow as pa
import pyarrow.parquet as pq
import pytest
import sklearn
from hypothesis import given, settings
from hypothesis import strategies as st
from scipy.special import softmax
from scipy.stats import multivariate_normal, norm
from sklearn.covariance import LedoitWolf, empirical_covariance, shrunk_covariance
from sklearn.datasets import load_digits, load_iris, load_wine
from sklearn.discriminant_analysis import LinearDiscriminantAnalysis, QuadraticDiscriminantAnalysis
from sklearn.naive_bayes import GaussianNB

import policyc.evidence.gaussian as gaussian_module
from policyc.compiler.build import CompiledPolicy, compile_policy
from policyc.evidence.gaussian import (
    GaussianFit,
    Moments,
    fit_covariances,
    fourth_moments_by_class,
    kernel_params,
    moments_by_class,
)
from policyc.language.diagnostics import CompileError, Diagnostic
from policyc.runtime.kernel import gaussian_log_likelihoods

# --- helpers -----------------------------------------------------------------------------------


def write_labelled_csv(path: Path, features: Sequence[str], X: np.ndarray, labels: Sequence[str]) -> Path:
    """repr(float) round-trips exactly, so the compiler sees the very numbers the references see."""
    lines = [",".join([*features, "label"])]
    lines += [",".join([*(repr(float(v)) for v in row), str(name)]) for row, name in zip(X, labels, strict=True)]
    path.write_text("\n".join(lines) + "\n", encoding="utf-8")
    return path


def gaussian_policy_text(
    classes: Sequence[str],
    features: Sequence[str],
    data: str,
    *,
    covariance: str = "full",
    shrinkage: str | float = "none",
    priors: str | dict[str, float] = "training",
    ignore_unknown_labels: bool = False,
) -> str:
    """A 0-1 loss policy (action say_k is right for class k only), written as YAML with JSON flow values."""
    loss = {f"say_{a}": {c: 0 if a == c else 1 for c in classes} for a in classes}
    training: dict[str, Any] = {"data": data, "label": "label"}
    if ignore_unknown_labels:
        training["ignore_unknown_labels"] = True
    return "\n".join(
        [
            "policy: evidence-test",
            f"classes: {json.dumps(list(classes))}",
            f"priors: {priors if priors == 'training' else json.dumps(priors)}",
            f"actions: {json.dumps(list(loss))}",
            f"loss: {json.dumps(loss)}",
            "evidence:",
            "  kind: gaussian",
            f"  covariance: {covariance}",
            f"  shrinkage: {json.dumps(shrinkage)}",
            f"  features: {json.dumps(list(features))}",
            f"  training: {json.dumps(training)}",
            "",
        ]
    )


def compile_text(directory: Path, text: str) -> CompiledPolicy:
    path = directory / "policy.yaml"
    path.write_text(text, encoding="utf-8")
    return compile_policy(path)


def compile_error(directory: Path, text: str) -> Diagnostic:
    with pytest.raises(CompileError) as info:
        compile_text(directory, text)
    (diagnostic,) = info.value.diagnostics
    return diagnostic


def line_of(text: str, start: str) -> int:
    """1-based number of the first line of ``text`` that starts with ``start``."""
    return next(i for i, line in enumerate(text.splitlines(), 1) if line.startswith(start))


def away_from_ties(posteriors: np.ndarray, margin: float = 1e-9) -> np.ndarray:
    top_two = np.sort(posteriors, axis=1)[:, -2:]
    return top_two[:, 1] - top_two[:, 0] > margin


def assert_posteriors_match(ours: np.ndarray, reference: np.ndarray, atol: float) -> float:
    """Posteriors agree to ``atol``; returns the observed max error (for the record)."""
    error = float(np.max(np.abs(ours - reference)))
    np.testing.assert_allclose(ours, reference, rtol=0.0, atol=atol)
    return error


def random_spd(rng: np.random.Generator, dim: int, spread: float) -> np.ndarray:
    """Q diag(λ) Qᵀ with log10 eigenvalues uniform in [-spread, spread], exactly symmetric
    (scipy reads only the lower triangle, references.md MV-2)."""
    q, _ = np.linalg.qr(rng.normal(size=(dim, dim)))
    eigenvalues = 10.0 ** rng.uniform(-spread, spread, size=dim)
    matrix = (q * eigenvalues) @ q.T
    return (matrix + matrix.T) / 2.0


# --- the reference library version -------------------------------------------------------------


def test_scikit_learn_is_the_version_whose_covariance_divisors_we_match() -> None:
    # scikit-learn 1.9.1 (PR #33626) switched QDA's per-class covariance and LDA 'svd''s pooled covariance
    # to the maximum-likelihood divisor n; 1.9.0 and earlier divide by n_k - 1 and n - K (references.md §7,
    # SK-6). The QDA/LDA comparisons below hold only for that convention, so a different version must fail
    # here first rather than as a puzzling posterior mismatch.
    assert sklearn.__version__ == "1.9.1"


# --- the compiled log-density ------------------------------------------------------------------


def test_log_density_constants_at_the_mean() -> None:
    # references.md MV-1: ln N(0; 0, I_d) = -(d/2) ln 2π, i.e. -ln 2π for d = 2 and -½ ln 2π for d = 1
    for dim in (1, 2):
        fit = GaussianFit(np.zeros((2, dim)), np.array([np.eye(dim)] * 2), (0.0, 0.0), (5, 5))
        log_likelihoods, valid = gaussian_log_likelihoods(np.zeros((1, dim)), kernel_params(fit))
        np.testing.assert_allclose(log_likelihoods, -(dim / 2) * math.log(2 * math.pi), rtol=1e-15)
        assert valid.all()


@pytest.mark.parametrize(
    ("n_classes", "dim", "spread", "seed"),
    [(2, 1, 1.0, 0), (3, 4, 1.0, 1), (4, 10, 2.0, 2), (5, 32, 3.0, 3)],
)
def test_log_densities_match_scipy(n_classes: int, dim: int, spread: float, seed: int) -> None:
    # ln N(x; μ, Σ) = -½[d ln 2π + ln det Σ + (x-μ)ᵀΣ⁻¹(x-μ)] via scipy.stats.multivariate_normal.logpdf
    # (references.md MV-1), rtol 1e-10, on random SPD matrices with condition numbers up to 10^(2·spread).
    rng = np.random.default_rng(seed)
    means = rng.normal(scale=5.0, size=(n_classes, dim))
    covariances = np.array([random_spd(rng, dim, spread) for _ in range(n_classes)])
    X = rng.normal(scale=6.0, size=(300, dim))
    fit = GaussianFit(means, covariances, (0.0,) * n_classes, (10,) * n_classes)

    ours, valid = gaussian_log_likelihoods(X, kernel_params(fit))

    reference = np.column_stack([multivariate_normal(means[k], covariances[k]).logpdf(X) for k in range(n_classes)])
    np.testing.assert_allclose(ours, reference, rtol=1e-10)
    assert valid.all()


# --- iris against scikit-learn's discriminant estimators ---------------------------------------

IRIS_FEATURES = ["sepal_length", "sepal_width", "petal_length", "petal_width"]
IRIS_CLASSES = ["setosa", "versicolor", "virginica"]


@pytest.fixture(scope="module")
def iris(tmp_path_factory: pytest.TempPathFactory) -> tuple[Path, np.ndarray, np.ndarray]:
    """Fisher 1936 iris data shipped with scikit-learn, made unbalanced (50/35/20 rows) so that
    count weighting and training priors are not hidden by equal class sizes."""
    X, y = load_iris(return_X_y=True)
    keep = np.concatenate([np.flatnonzero(y == k)[:count] for k, count in enumerate((50, 35, 20))])
    X, y = X[keep], y[keep]
    directory = tmp_path_factory.mktemp("iris")
    write_labelled_csv(directory / "iris.csv", IRIS_FEATURES, X, [IRIS_CLASSES[k] for k in y])
    return directory, X, y


def far_field(X: np.ndarray, seed: int) -> np.ndarray:
    """Points 60 standard deviations from the data, where every class density underflows in linear space."""
    rng = np.random.default_rng(seed)
    directions = rng.normal(size=(6, X.shape[1]))
    directions /= np.linalg.norm(directions, axis=1, keepdims=True)
    return X.mean(axis=0) + 60.0 * X.std(axis=0) * directions


IRIS_REFERENCES = {
    # covariance -> reference estimator (references.md SK-6 for QDA/LDA, SK-3 for GaussianNB)
    "full": lambda priors: QuadraticDiscriminantAnalysis(priors=priors),
    "tied": lambda priors: LinearDiscriminantAnalysis(solver="svd", priors=priors),
    "diagonal": lambda priors: GaussianNB(var_smoothing=0.0, priors=priors),
}


@pytest.mark.parametrize("covariance", ["full", "tied", "diagonal"])
@pytest.mark.parametrize("priors", ["training", (0.2, 0.3, 0.5)], ids=["training-priors", "stated-priors"])
def test_iris_posteriors_match_scikit_learn(
    covariance: str, priors: str | tuple[float, ...], iris: tuple[Path, np.ndarray, np.ndarray], tmp_path: Path
) -> None:
    # Fisher 1936 iris data shipped with scikit-learn. full = QuadraticDiscriminantAnalysis (1.9.1: ML covariance
    # per class); tied = LinearDiscriminantAnalysis(solver='svd') (1.9.1: within-class scatter / n, classes
    # weighted by counts, priors not used for pooling); diagonal = GaussianNB(var_smoothing=0) (np.var, ddof 0).
    # references.md SK-6 reports 3e-13 agreement on log-posteriors; we allow atol 1e-9 on posteriors and
    # rtol 1e-12 + atol 1e-9 on log-posteriors (observed: posteriors ~4e-15, log-posteriors ~7e-12).
    directory, X, y = iris
    stated = None if priors == "training" else dict(zip(IRIS_CLASSES, priors, strict=True))
    text = gaussian_policy_text(
        IRIS_CLASSES, IRIS_FEATURES, str(directory / "iris.csv"), covariance=covariance, priors=stated or "training"
    )
    rule = compile_text(tmp_path, text).rule
    reference = IRIS_REFERENCES[covariance](None if stated is None else np.array(priors)).fit(X, y)
    # training rows plus far-field rows (MV-3: linear-space densities underflow there, log-sum-exp must not)
    evaluation = np.vstack([X, far_field(X, seed=7)])

    ours = rule.posteriors(evaluation)
    expected = reference.predict_proba(evaluation)

    assert_posteriors_match(ours, expected, atol=1e-9)
    expected_log = reference.predict_log_proba(evaluation)
    usable = expected_log > -700.0  # below, the posterior itself is subnormal or zero in float64
    with np.errstate(divide="ignore"):
        np.testing.assert_allclose(np.log(ours)[usable], expected_log[usable], rtol=1e-12, atol=1e-9)
    # 0-1 loss: the minimum-risk action is the MAP class; compare away from ties (references.md, tie conventions)
    clear = away_from_ties(expected)
    assert clear.sum() >= len(evaluation) - 2
    np.testing.assert_array_equal(rule.decide(evaluation)[clear], reference.predict(evaluation)[clear])


def test_iris_far_field_really_underflows_in_linear_space(iris: tuple[Path, np.ndarray, np.ndarray]) -> None:
    # The far-field rows of the test above are a real underflow case: exp(ln N) is 0.0 for every class
    # (ML class covariances from numpy, log-density from scipy, references.md MV-1 and MV-3).
    _, X, y = iris
    far = far_field(X, seed=7)
    for k in range(3):
        rows = X[y == k]
        log_density = multivariate_normal(rows.mean(axis=0), np.cov(rows.T, bias=True)).logpdf(far)
        assert (np.exp(log_density) == 0.0).all()


def test_iris_compiles_the_same_rule_from_tiny_batches(
    iris: tuple[Path, np.ndarray, np.ndarray], tmp_path: Path, monkeypatch: pytest.MonkeyPatch
) -> None:
    # Streaming the file in 7-row batches (many merges) gives the same posteriors as one batch, to 1e-12.
    directory, X, _ = iris
    text = gaussian_policy_text(IRIS_CLASSES, IRIS_FEATURES, str(directory / "iris.csv"), shrinkage="auto")
    whole = compile_text(tmp_path, text).rule
    monkeypatch.setattr(gaussian_module, "FIT_BATCH_ROWS", 7)
    batched = compile_text(tmp_path, text).rule
    np.testing.assert_allclose(batched.posteriors(X), whole.posteriors(X), rtol=0.0, atol=1e-12)
    assert batched.manifest["training_class_counts"] == whole.manifest["training_class_counts"]


def test_priors_training_are_recorded_in_the_manifest(
    iris: tuple[Path, np.ndarray, np.ndarray], tmp_path: Path
) -> None:
    directory, _, y = iris
    rule = compile_text(tmp_path, gaussian_policy_text(IRIS_CLASSES, IRIS_FEATURES, str(directory / "iris.csv"))).rule
    counts = np.bincount(y, minlength=3)  # straight from the data the test wrote
    manifest = rule.manifest
    assert manifest["priors_source"] == "training"
    assert manifest["training_class_counts"] == dict(zip(IRIS_CLASSES, counts.tolist(), strict=True))
    for name, count in zip(IRIS_CLASSES, counts, strict=True):
        assert manifest["training_priors"][name] == pytest.approx(count / counts.sum(), rel=1e-15)
        assert manifest["priors"][name] == pytest.approx(count / counts.sum(), rel=1e-15)


def test_stated_priors_keep_the_training_counts_beside_them(
    iris: tuple[Path, np.ndarray, np.ndarray], tmp_path: Path
) -> None:
    directory, _, y = iris
    stated = {"setosa": 0.2, "versicolor": 0.3, "virginica": 0.5}
    text = gaussian_policy_text(IRIS_CLASSES, IRIS_FEATURES, str(directory / "iris.csv"), priors=stated)
    manifest = compile_text(tmp_path, text).rule.manifest
    assert manifest["priors_source"] == "policy"
    assert manifest["priors"] == pytest.approx(stated, rel=1e-15)
    counts = np.bincount(y, minlength=3)
    assert manifest["training_class_counts"] == dict(zip(IRIS_CLASSES, counts.tolist(), strict=True))


# --- Ledoit-Wolf and fixed shrinkage -----------------------------------------------------------

WINE_CLASSES = ["cultivar_1", "cultivar_2", "cultivar_3"]


@pytest.fixture(scope="module")
def wine() -> tuple[np.ndarray, np.ndarray]:
    # UCI wine data (Forina et al., PARVUS) shipped with scikit-learn: feature scales differ by ~10³
    # (references.md §7), a fair test for shrinkage toward (tr S / p) I on raw features.
    return load_wine(return_X_y=True)


def uneven_batches(X: np.ndarray, y: np.ndarray, cuts: Sequence[int]) -> list[tuple[np.ndarray, np.ndarray]]:
    return list(zip(np.split(X, cuts), np.split(y.astype(np.int64), cuts), strict=True))


def fit_wine(X: np.ndarray, y: np.ndarray, covariance: str, shrinkage: str | float) -> GaussianFit:
    batches = uneven_batches(X, y, [1, 40, 41, 97, 150])
    moments = moments_by_class(batches, 3, X.shape[1])
    return fit_covariances(
        moments, WINE_CLASSES, covariance, shrinkage, lambda means: fourth_moments_by_class(batches, means)
    )


def test_auto_shrinkage_matches_ledoit_wolf_per_class(wine: tuple[np.ndarray, np.ndarray]) -> None:
    # Ledoit & Wolf 2004 via sklearn.covariance.LedoitWolf on the raw features of each class
    # (references.md LW-1, LW-2), rtol 1e-12 on the intensity and the covariance (observed ~1e-15).
    X, y = wine
    fit = fit_wine(X, y, "full", "auto")
    for k in range(3):
        reference = LedoitWolf().fit(X[y == k])
        assert fit.intensities[k] == pytest.approx(reference.shrinkage_, rel=1e-12)
        np.testing.assert_allclose(fit.covariances[k], reference.covariance_, rtol=1e-12, atol=0.0)
        np.testing.assert_allclose(fit.means[k], reference.location_, rtol=1e-13)


def test_tied_auto_shrinkage_matches_ledoit_wolf_on_class_centred_rows(wine: tuple[np.ndarray, np.ndarray]) -> None:
    # tied + auto: one Ledoit-Wolf intensity for the pooled ML scatter = LedoitWolf(assume_centered=True) on rows
    # centred by their own class mean (references.md LW-1, LW-2), rtol 1e-12 (observed ~4e-15).
    X, y = wine
    fit = fit_wine(X, y, "tied", "auto")
    class_means = np.array([X[y == k].mean(axis=0) for k in range(3)])
    reference = LedoitWolf(assume_centered=True).fit(X - class_means[y])
    assert fit.intensities == pytest.approx((reference.shrinkage_,), rel=1e-12)
    for k in range(3):
        np.testing.assert_allclose(fit.covariances[k], reference.covariance_, rtol=1e-12, atol=0.0)


@pytest.mark.parametrize("alpha", [0.0, 0.25, 1.0])
def test_fixed_shrinkage_matches_shrunk_covariance(wine: tuple[np.ndarray, np.ndarray], alpha: float) -> None:
    # Σ* = (1 - α) S + α (tr S / p) I via sklearn.covariance.shrunk_covariance(empirical_covariance(X), α)
    # (references.md LW-2), rtol 1e-12.
    X, y = wine
    fit = fit_wine(X, y, "full", alpha)
    for k in range(3):
        expected = shrunk_covariance(empirical_covariance(X[y == k]), shrinkage=alpha)
        np.testing.assert_allclose(fit.covariances[k], expected, rtol=1e-12, atol=0.0)
    assert fit.intensities == (alpha,) * 3


def test_compiled_fixed_shrinkage_posteriors_match_scipy(wine: tuple[np.ndarray, np.ndarray], tmp_path: Path) -> None:
    # End to end on wine: posteriors = softmax(ln N(x; μ_k, shrunk_covariance(S_k, 0.25)) + ln π_k)
    # with scipy.stats.multivariate_normal and scipy.special.softmax (references.md LW-2, MV-1, MV-3), atol 1e-10.
    X, y = wine
    features = [f"f{j}" for j in range(X.shape[1])]
    write_labelled_csv(tmp_path / "wine.csv", features, X, [WINE_CLASSES[k] for k in y])
    rule = compile_text(tmp_path, gaussian_policy_text(WINE_CLASSES, features, "wine.csv", shrinkage=0.25)).rule
    log_priors = np.log(np.bincount(y) / len(y))
    log_densities = np.column_stack(
        [
            multivariate_normal(
                X[y == k].mean(axis=0), shrunk_covariance(empirical_covariance(X[y == k]), 0.25)
            ).logpdf(X)
            for k in range(3)
        ]
    )
    assert_posteriors_match(rule.posteriors(X), softmax(log_densities + log_priors, axis=1), atol=1e-10)


# --- streaming moments -------------------------------------------------------------------------


@st.composite
def split_rows(draw: st.DrawFn) -> tuple[np.ndarray, list[np.ndarray], list[int]]:
    """Rows (seeded normal data, optionally far from the origin) cut at random points into uneven pieces,
    some of them empty, plus a random order of the pieces."""
    seed = draw(st.integers(0, 2**32 - 1))
    n_rows = draw(st.integers(1, 200))
    n_features = draw(st.integers(1, 6))
    offset = draw(st.sampled_from([0.0, 3.0, 1e3]))
    rng = np.random.default_rng(seed)
    rows = offset + rng.normal(size=(n_rows, n_features)) * rng.uniform(0.1, 10.0, size=n_features)
    cuts = sorted(draw(st.lists(st.integers(0, n_rows), max_size=15)))
    pieces = np.split(rows, cuts)
    order = draw(st.permutations(range(len(pieces))))
    return rows, pieces, list(order)


def tree_merge(parts: list[Moments]) -> Moments:
    if len(parts) == 1:
        return parts[0]
    middle = len(parts) // 2
    return tree_merge(parts[:middle]).merge(tree_merge(parts[middle:]))


def assert_same_moments(ours: Moments, expected: Moments) -> None:
    assert ours.count == expected.count
    scale = float(np.max(np.abs(expected.mean))) + float(np.sqrt(np.max(np.diag(expected.scatter), initial=0.0)))
    np.testing.assert_allclose(ours.mean, expected.mean, rtol=1e-10, atol=1e-12 * scale)
    np.testing.assert_allclose(
        ours.scatter, expected.scatter, rtol=1e-10, atol=1e-10 * float(np.max(np.diag(expected.scatter), initial=0.0))
    )


@settings(max_examples=80, deadline=None, derandomize=True)
@given(split_rows())
def test_moments_over_uneven_batches_equal_one_pass(case: tuple[np.ndarray, list[np.ndarray], list[int]]) -> None:
    # Pairwise update (Chan, Golub & LeVeque 1979): any split, any merge order, left fold or tree,
    # gives the moments of all rows; these equal numpy's mean and ML covariance times n (rtol 1e-10).
    rows, pieces, order = case
    n_features = rows.shape[1]
    whole = Moments.of(rows)
    np.testing.assert_allclose(whole.mean, rows.mean(axis=0), rtol=1e-12)
    if rows.shape[0] > 1:
        numpy_scatter = np.atleast_2d(np.cov(rows.T, bias=True)) * rows.shape[0]
        assert_same_moments(whole, Moments(rows.shape[0], rows.mean(axis=0), numpy_scatter))

    parts = [Moments.of(piece) for piece in pieces]
    left_fold = functools.reduce(Moments.merge, parts, Moments.empty(n_features))
    permuted = functools.reduce(Moments.merge, [parts[i] for i in order], Moments.empty(n_features))
    assert_same_moments(left_fold, whole)
    assert_same_moments(permuted, whole)
    assert_same_moments(tree_merge([parts[i] for i in order]), whole)


def test_moments_by_class_equals_moments_of_each_class() -> None:
    rng = np.random.default_rng(11)
    rows = rng.normal(size=(500, 3)) + 50.0
    codes = rng.integers(-1, 4, size=500)  # -1: an ignored unknown label
    batches = [(rows[a:b], codes[a:b]) for a, b in [(0, 1), (1, 130), (130, 131), (131, 400), (400, 500)]]
    moments = moments_by_class(batches, 4, 3)
    for k in range(4):
        assert_same_moments(moments[k], Moments.of(rows[codes == k]))


# --- degenerate data: digits -------------------------------------------------------------------

DIGIT_CLASSES = [str(k) for k in range(10)]


@pytest.fixture(scope="module")
def digits(tmp_path_factory: pytest.TempPathFactory) -> tuple[Path, np.ndarray, np.ndarray, list[str]]:
    # Alpaydin & Kaynak optical digits (UCI), shipped with scikit-learn: 1797 × 64, three features constant over
    # the whole set and every class with zero-variance features (references.md §7).
    X, y = load_digits(return_X_y=True)
    features = [f"px{j}" for j in range(X.shape[1])]
    directory = tmp_path_factory.mktemp("digits")
    write_labelled_csv(directory / "digits.csv", features, X, [str(k) for k in y])
    return directory, X, y, features


@pytest.mark.parametrize("covariance", ["full", "diagonal", "tied"])
def test_digits_without_shrinkage_is_a_singular_covariance(
    covariance: str, digits: tuple[Path, np.ndarray, np.ndarray, list[str]], tmp_path: Path
) -> None:
    directory, X, y, features = digits
    # The data really are degenerate: some class has a feature of zero variance, and some feature is
    # constant over the whole set (so the pooled covariance is singular too).
    assert all((np.var(X[y == k], axis=0) == 0.0).any() for k in range(10))
    assert (np.var(X, axis=0) == 0.0).any()
    # Every class has at least 65 rows, so the row count (d + 1 = 65 for a full covariance) is not the problem.
    assert np.bincount(y).min() >= X.shape[1] + 1
    text = gaussian_policy_text(DIGIT_CLASSES, features, str(directory / "digits.csv"), covariance=covariance)

    diagnostic = compile_error(tmp_path, text)

    assert diagnostic.code == "singular-covariance"
    assert diagnostic.path == ("evidence",)
    assert diagnostic.file == str(tmp_path / "policy.yaml")
    # located at the evidence key itself (a block mapping's diagnostics point at its key line)
    assert (diagnostic.line, diagnostic.col) == (line_of(text, "evidence:"), 1)
    named = re.search(r"covariance of '([^']+)'", diagnostic.message)
    assert named is not None, diagnostic.message
    if covariance == "tied":
        assert "pooled" in named.group(1)
    else:
        k = DIGIT_CLASSES.index(named.group(1))
        assert (np.var(X[y == k], axis=0) == 0.0).any()
    assert diagnostic.hint is not None and "shrinkage" in diagnostic.hint


def test_digits_with_too_few_rows_per_class_says_so_first(
    digits: tuple[Path, np.ndarray, np.ndarray, list[str]], tmp_path: Path
) -> None:
    # 40 rows per class and 64 features: a full ML covariance has rank <= 39 < 64, so the row count is
    # reported before the (also singular) covariance.
    _, X, y, features = digits
    keep = np.concatenate([np.flatnonzero(y == k)[:40] for k in range(10)])
    write_labelled_csv(tmp_path / "few.csv", features, X[keep], [str(k) for k in y[keep]])
    text = gaussian_policy_text(DIGIT_CLASSES, features, "few.csv")

    diagnostic = compile_error(tmp_path, text)

    assert diagnostic.code == "too-few-rows"
    assert "'0'" in diagnostic.message and "40 training rows" in diagnostic.message
    assert diagnostic.line == line_of(text, "evidence:")

    # Shrinkage needs only two rows per class and makes every covariance positive definite.
    rule = compile_text(tmp_path, gaussian_policy_text(DIGIT_CLASSES, features, "few.csv", shrinkage="auto")).rule
    assert np.isfinite(rule.posteriors(X[:200])).all()


def test_digits_full_auto_shrinkage_matches_ledoit_wolf_densities(
    digits: tuple[Path, np.ndarray, np.ndarray, list[str]], tmp_path: Path
) -> None:
    # Posteriors = softmax(ln N(x; μ_k, LedoitWolf().fit(X_k).covariance_) + ln π_k): Ledoit & Wolf 2004 via
    # sklearn.covariance.LedoitWolf, densities via scipy.stats.multivariate_normal (references.md LW-1, MV-1,
    # MV-3), atol 1e-10 (observed ~1e-14).
    directory, X, y, features = digits
    text = gaussian_policy_text(DIGIT_CLASSES, features, str(directory / "digits.csv"), shrinkage="auto")
    rule = compile_text(tmp_path, text).rule
    references = [LedoitWolf().fit(X[y == k]) for k in range(10)]
    log_densities = np.column_stack(
        [multivariate_normal(ref.location_, ref.covariance_).logpdf(X) for ref in references]
    )
    expected = softmax(log_densities + np.log(np.bincount(y) / len(y)), axis=1)

    ours = rule.posteriors(X)

    assert np.isfinite(ours).all()
    assert_posteriors_match(ours, expected, atol=1e-10)
    intensities = rule.manifest["evidence"]["shrinkage_intensity"]
    for k, ref in enumerate(references):
        assert intensities[DIGIT_CLASSES[k]] == pytest.approx(ref.shrinkage_, rel=1e-12)
    clear = away_from_ties(expected)
    np.testing.assert_array_equal(rule.decide(X)[clear], np.argmax(expected, axis=1)[clear])


def test_digits_tied_auto_shrinkage_matches_ledoit_wolf_densities(
    digits: tuple[Path, np.ndarray, np.ndarray, list[str]], tmp_path: Path
) -> None:
    # tied + auto: LedoitWolf(assume_centered=True) on class-centred rows (references.md LW-1, LW-2), atol 1e-10.
    directory, X, y, features = digits
    text = gaussian_policy_text(
        DIGIT_CLASSES, features, str(directory / "digits.csv"), covariance="tied", shrinkage="auto"
    )
    rule = compile_text(tmp_path, text).rule
    means = np.array([X[y == k].mean(axis=0) for k in range(10)])
    reference = LedoitWolf(assume_centered=True).fit(X - means[y])
    log_densities = np.column_stack([multivariate_normal(means[k], reference.covariance_).logpdf(X) for k in range(10)])
    expected = softmax(log_densities + np.log(np.bincount(y) / len(y)), axis=1)
    assert_posteriors_match(rule.posteriors(X), expected, atol=1e-10)
    assert rule.manifest["evidence"]["shrinkage_intensity"]["pooled"] == pytest.approx(reference.shrinkage_, rel=1e-12)


@pytest.mark.parametrize("shrinkage", ["auto", 0.1])
def test_digits_diagonal_with_shrinkage_matches_independent_normals(
    shrinkage: str | float, digits: tuple[Path, np.ndarray, np.ndarray, list[str]], tmp_path: Path
) -> None:
    # diagonal with shrinkage keeps the diagonal of the shrunk covariance: each variance becomes
    # (1 - α) σ²_j + α tr(S)/p > 0, so zero-variance pixels no longer break the fit. Reference: the diagonal of
    # sklearn.covariance.LedoitWolf (auto) or shrunk_covariance (fixed α) (references.md LW-1, LW-2), densities
    # as sums of scipy.stats.norm.logpdf, posteriors by scipy.special.softmax; atol 1e-10.
    directory, X, y, features = digits
    text = gaussian_policy_text(
        DIGIT_CLASSES, features, str(directory / "digits.csv"), covariance="diagonal", shrinkage=shrinkage
    )
    rule = compile_text(tmp_path, text).rule
    log_densities = np.empty((X.shape[0], 10))
    for k in range(10):
        rows = X[y == k]
        shrunk = (
            LedoitWolf().fit(rows).covariance_
            if shrinkage == "auto"
            else shrunk_covariance(empirical_covariance(rows), float(shrinkage))
        )
        log_densities[:, k] = norm.logpdf(X, rows.mean(axis=0), np.sqrt(np.diag(shrunk))).sum(axis=1)
    expected = softmax(log_densities + np.log(np.bincount(y) / len(y)), axis=1)

    posteriors = rule.posteriors(X)

    assert np.isfinite(posteriors).all()
    assert_posteriors_match(posteriors, expected, atol=1e-10)


# --- data errors at compile time ---------------------------------------------------------------

SMALL_FEATURES = ["mass_g", "brix"]
SMALL_CLASSES = ["ok", "bad"]


def small_data(n_rows: int = 12, seed: int = 5) -> tuple[np.ndarray, list[str]]:
    rng = np.random.default_rng(seed)
    X = rng.normal(loc=[150.0, 12.0], scale=[10.0, 1.5], size=(n_rows, 2))
    return X, ["ok" if i % 3 else "bad" for i in range(n_rows)]


def test_unknown_label_names_the_row(tmp_path: Path, monkeypatch: pytest.MonkeyPatch) -> None:
    X, labels = small_data()
    labels[8] = "mango"  # data row 9
    write_labelled_csv(tmp_path / "train.csv", SMALL_FEATURES, X, labels)
    text = gaussian_policy_text(SMALL_CLASSES, SMALL_FEATURES, "train.csv", covariance="diagonal")
    # also in 5-row batches: the row number must count across batches (the bad row is in the second batch)
    for batch_rows in (65_536, 5):
        monkeypatch.setattr(gaussian_module, "FIT_BATCH_ROWS", batch_rows)
        diagnostic = compile_error(tmp_path, text)
        assert diagnostic.code == "unknown-label"
        assert re.search(r"\brow 9\b", diagnostic.message), diagnostic.message
        assert "'mango'" in diagnostic.message
        assert diagnostic.path == ("evidence", "training")
        assert diagnostic.line == line_of(text, "  training:")


def test_ignore_unknown_labels_skips_the_row(tmp_path: Path) -> None:
    X, labels = small_data()
    labels[8] = "mango"
    write_labelled_csv(tmp_path / "train.csv", SMALL_FEATURES, X, labels)
    text = gaussian_policy_text(
        SMALL_CLASSES, SMALL_FEATURES, "train.csv", covariance="diagonal", ignore_unknown_labels=True
    )
    rule = compile_text(tmp_path, text).rule
    known = [i for i, name in enumerate(labels) if name != "mango"]
    assert rule.manifest["training_class_counts"] == {
        name: sum(labels[i] == name for i in known) for name in SMALL_CLASSES
    }
    # the skipped row does not enter the fit: the diagonal ML Gaussians of the remaining rows (GaussianNB with
    # var_smoothing=0, references.md SK-3) give the same posteriors, atol 1e-12
    kept_labels = np.array([labels[i] for i in known])
    reference = GaussianNB(var_smoothing=0.0).fit(X[known], kept_labels)
    expected = reference.predict_proba(X)[:, [list(reference.classes_).index(c) for c in SMALL_CLASSES]]
    assert_posteriors_match(rule.posteriors(X), expected, atol=1e-12)


def test_class_without_rows_is_named(tmp_path: Path) -> None:
    X, labels = small_data()
    write_labelled_csv(tmp_path / "train.csv", SMALL_FEATURES, X, labels)
    text = gaussian_policy_text([*SMALL_CLASSES, "rotten"], SMALL_FEATURES, "train.csv", covariance="diagonal")
    diagnostic = compile_error(tmp_path, text)
    assert diagnostic.code == "class-without-rows"
    assert "'rotten'" in diagnostic.message
    assert diagnostic.path == ("evidence", "training")


@pytest.mark.parametrize("bad_value", ["nan", "inf", "-inf"])
def test_non_finite_training_value_names_the_row(bad_value: str, tmp_path: Path) -> None:
    X, labels = small_data()
    X[6, 1] = float(bad_value)  # data row 7; repr() writes nan / inf / -inf
    write_labelled_csv(tmp_path / "train.csv", SMALL_FEATURES, X, labels)
    diagnostic = compile_error(tmp_path, gaussian_policy_text(SMALL_CLASSES, SMALL_FEATURES, "train.csv"))
    assert diagnostic.code == "training-value-not-finite"
    assert re.search(r"\brow 7\b", diagnostic.message), diagnostic.message


def test_non_finite_parquet_training_value_names_the_row(tmp_path: Path) -> None:
    X, labels = small_data()
    X[10, 0] = np.nan  # data row 11
    table = pa.table({"mass_g": X[:, 0], "brix": X[:, 1], "label": labels})
    pq.write_table(table, tmp_path / "train.parquet", row_group_size=4)
    diagnostic = compile_error(tmp_path, gaussian_policy_text(SMALL_CLASSES, SMALL_FEATURES, "train.parquet"))
    assert diagnostic.code == "training-value-not-finite"
    assert re.search(r"\brow 11\b", diagnostic.message), diagnostic.message


def test_unreadable_training_value_names_column_and_row(tmp_path: Path) -> None:
    X, labels = small_data()
    write_labelled_csv(tmp_path / "train.csv", SMALL_FEATURES, X, labels)
    lines = (tmp_path / "train.csv").read_text(encoding="utf-8").splitlines()
    lines[4] = "heavy," + lines[4].split(",", 1)[1]  # data row 4 is on line 5
    (tmp_path / "train.csv").write_text("\n".join(lines) + "\n", encoding="utf-8")
    text = gaussian_policy_text(SMALL_CLASSES, SMALL_FEATURES, "train.csv")
    diagnostic = compile_error(tmp_path, text)
    assert diagnostic.code == "training-data-unusable"
    assert "'mass_g'" in diagnostic.message and "'heavy'" in diagnostic.message
    assert re.search(r"\brow 4 \(line 5\)", diagnostic.message), diagnostic.message


def test_progress_counts_each_row_once_per_named_pass(tmp_path: Path) -> None:
    # Ledoit-Wolf reads the training file twice; each pass reports its own rows, named, never a doubled total
    from helpers import PACKHOUSE

    from policyc.evidence import fit_evidence
    from policyc.language.model import build_policy
    from policyc.language.source import parse_source

    text = PACKHOUSE.read_text(encoding="utf-8").replace("shrinkage: none", "shrinkage: auto")
    text = text.replace("data: train.csv", f"data: {PACKHOUSE.parent / 'train.csv'}")
    policy = build_policy(parse_source(text[: text.index("    sha256:")]))
    seen: dict[str, int] = {}

    def record(rows: int, total: int | None, stage: str = "") -> None:
        seen[stage] = seen.get(stage, 0) + rows

    fit_evidence(policy, None, record)
    rows = len((PACKHOUSE.parent / "train.csv").read_text(encoding="utf-8").splitlines()) - 1
    assert seen == {"pass 1 of 2": rows, "pass 2 of 2": rows}


# --- boundaries of the fit: scale of the data, one feature, row counts, conditioning --------------------


def fit_rows(rows_by_class: Sequence[np.ndarray], covariance: str, shrinkage: str | float) -> GaussianFit:
    """Fit straight from per-class row arrays (one batch)."""
    X = np.vstack(rows_by_class)
    codes = np.repeat(np.arange(len(rows_by_class)), [len(rows) for rows in rows_by_class])
    batches = [(X, codes)]
    moments = moments_by_class(batches, len(rows_by_class), X.shape[1])
    classes = [f"c{k}" for k in range(len(rows_by_class))]
    return fit_covariances(
        moments, classes, covariance, shrinkage, lambda means: fourth_moments_by_class(batches, means)
    )


@pytest.mark.parametrize("scale", [0.01, 1e-4, 100.0])
def test_ledoit_wolf_intensity_is_scale_free_and_matches_scikit_learn(
    wine: tuple[np.ndarray, np.ndarray], scale: float
) -> None:
    # sklearn.covariance.ledoit_wolf on features scaled by 0.01 (references.md LW-1): the intensity b²/d² does not
    # depend on the unit, although d² and b̄² fall far below 1 on small-scale data.
    from sklearn.covariance import ledoit_wolf

    X, y = wine
    fit = fit_rows([X[y == k] * scale for k in range(3)], "full", "auto")
    for k in range(3):
        _, reference = ledoit_wolf(X[y == k] * scale)
        assert fit.intensities[k] == pytest.approx(reference, rel=1e-10)
        assert fit.intensities[k] == pytest.approx(fit_wine(X, y, "full", "auto").intensities[k], rel=1e-10)


def test_ledoit_wolf_intensity_of_one_feature_is_zero(wine: tuple[np.ndarray, np.ndarray]) -> None:
    # One feature: S equals its own target m·I, so d² = 0 and nothing is shrunk; sklearn's ledoit_wolf agrees.
    from sklearn.covariance import ledoit_wolf

    X, y = wine
    rows = [X[y == k][:, :1] * 0.01 for k in range(3)]
    fit = fit_rows(rows, "full", "auto")
    assert fit.intensities == (0.0, 0.0, 0.0)
    assert [ledoit_wolf(r)[1] for r in rows] == [0.0, 0.0, 0.0]
    np.testing.assert_allclose(fit.covariances[:, 0, 0], [r.var() for r in rows], rtol=1e-12)


def test_ledoit_wolf_intensity_is_zero_for_rows_of_an_exactly_spherical_sample() -> None:
    # The four points (±1, 0), (0, ±1) have S = ½ I exactly: d² = 0, so the intensity is 0 (no division by zero).
    rows = np.array([[1.0, 0.0], [-1.0, 0.0], [0.0, 1.0], [0.0, -1.0]])
    fit = fit_rows([rows, rows + 5.0], "full", "auto")
    assert fit.intensities == (0.0, 0.0)
    np.testing.assert_allclose(fit.covariances, [0.5 * np.eye(2)] * 2, rtol=1e-15)


def test_ledoit_wolf_intensity_clips_at_one_when_the_noise_exceeds_the_spread() -> None:
    # On these six heavy-tailed rows (found by a seeded search) b̄² ≥ d², so b² = min(b̄², d²) = d² and the
    # intensity is exactly 1 (references.md LW-1); sklearn's ledoit_wolf says the same.
    from sklearn.covariance import ledoit_wolf

    rows = np.array([[-3, 1, 9], [5, -1, 0], [-2, 0, 0], [3, 0, -1], [-9, -9, 0], [0, 0, 7]], dtype=float)
    fit = fit_rows([rows, rows * 2.0], "full", "auto")
    assert fit.intensities == (1.0, 1.0)
    assert ledoit_wolf(rows)[1] == 1.0
    np.testing.assert_allclose(fit.covariances[0], np.trace(np.cov(rows.T, bias=True)) / 3 * np.eye(3), rtol=1e-14)


@pytest.mark.parametrize(
    ("covariance", "shrinkage", "needed"),
    [("full", "none", 4), ("full", 0.5, 2), ("diagonal", "none", 2), ("tied", "none", 2)],
)
def test_row_count_boundary_per_covariance_structure(covariance: str, shrinkage: str | float, needed: int) -> None:
    # A full ML covariance of d features needs d + 1 rows to be non-singular (d = 3 here); the others need 2.
    rng = np.random.default_rng(31)
    enough = [rng.normal(size=(needed, 3)), rng.normal(size=(8, 3))]
    assert fit_rows(enough, covariance, shrinkage).counts == (needed, 8)
    with pytest.raises(
        gaussian_module.FitProblem, match=f"has {needed - 1} training rows.*needs at least {needed}"
    ) as info:
        fit_rows([enough[0][:-1], enough[1]], covariance, shrinkage)
    assert info.value.code == "too-few-rows"


@pytest.mark.parametrize(
    ("ratio", "refused"), [(1e13, True), (1.5e12, True), (1e12, True), (9e11, False), (1e6, False)]
)
def test_an_ill_conditioned_covariance_is_refused_from_the_limit_up(ratio: float, refused: bool) -> None:
    # Positive definite but with eigenvalue ratio ≥ CONDITION_LIMIT (1e12): float64 whitening would lose most digits.
    eigenvalues = np.array([1.0, 0.1, 1.0 / ratio])
    # scatter 2·diag(λ) over 2 rows: the ML covariance is diag(λ) exactly, so the ratio is exactly `ratio`
    moments = [Moments(2, np.zeros(3), 2.0 * np.diag(eigenvalues)), Moments(2, np.ones(3), 2.0 * np.eye(3))]
    if not refused:
        fit_covariances(moments, ["a", "b"], "diagonal", "none", None)
        return
    with pytest.raises(gaussian_module.FitProblem) as info:
        fit_covariances(moments, ["a", "b"], "diagonal", "none", None)
    assert info.value.code == "singular-covariance"
    assert f"eigenvalue ratio {ratio:.3g}" in info.value.message


def test_a_zero_covariance_is_refused_with_an_infinite_ratio() -> None:
    rows = np.ones((4, 2))
    with pytest.raises(gaussian_module.FitProblem, match="eigenvalue ratio infinite") as info:
        fit_rows([rows, rows + 1.0], "diagonal", "none")
    assert info.value.code == "singular-covariance"


@pytest.mark.parametrize(
    ("shrinkage", "stages"), [("auto", ["pass 1 of 2", "pass 2 of 2"]), ("none", [""]), (0.2, [""])]
)
def test_the_fit_reads_the_data_twice_only_for_ledoit_wolf(
    iris: tuple[Path, np.ndarray, np.ndarray],
    shrinkage: str | float,
    stages: list[str],
    monkeypatch: pytest.MonkeyPatch,
    tmp_path: Path,
) -> None:
    # Each pass reports every batch's row count against the file's row count (a Parquet file knows it), named by
    # pass when there are two.
    from policyc.language.model import build_policy
    from policyc.language.source import parse_source

    _, X, y = iris
    table = {name: X[:, j] for j, name in enumerate(IRIS_FEATURES)} | {"label": [IRIS_CLASSES[k] for k in y]}
    pq.write_table(pa.table(table), tmp_path / "iris.parquet")
    monkeypatch.setattr(gaussian_module, "FIT_BATCH_ROWS", 40)
    text = gaussian_policy_text(IRIS_CLASSES, IRIS_FEATURES, "iris.parquet", shrinkage=shrinkage)
    policy = build_policy(parse_source(text, "policy.yaml", base_dir=tmp_path))
    calls: list[tuple[int, int | None, str]] = []
    gaussian_module.fit(policy, policy.evidence, tmp_path, lambda *call: calls.append(call))  # type: ignore[arg-type]
    assert calls == [(rows, X.shape[0], stage) for stage in stages for rows in (40, 40, 25)]


def test_fit_covariances_never_asks_for_fourth_moments_without_auto_shrinkage() -> None:
    rows = np.random.default_rng(3).normal(size=(12, 2))
    moments = [Moments.of(rows[:6]), Moments.of(rows[6:])]

    def refuse(means: np.ndarray) -> np.ndarray:
        raise AssertionError("a second pass over the data was started")

    for covariance in ("full", "tied", "diagonal"):
        fit_covariances(moments, ["a", "b"], covariance, "none", refuse)
        fit_covariances(moments, ["a", "b"], covariance, 0.3, refuse)


def test_without_a_base_directory_a_relative_training_path_is_read_from_the_working_directory(
    iris: tuple[Path, np.ndarray, np.ndarray], monkeypatch: pytest.MonkeyPatch
) -> None:
    from policyc.language.model import build_policy
    from policyc.language.source import parse_source

    directory, _, _ = iris
    text = gaussian_policy_text(IRIS_CLASSES, IRIS_FEATURES, "iris.csv")
    policy = build_policy(parse_source(text, "policy.yaml", base_dir=directory))
    monkeypatch.chdir(directory)
    fitted = gaussian_module.fit(policy, policy.evidence, None)  # type: ignore[arg-type]
    assert fitted.training_counts == {"setosa": 50, "versicolor": 35, "virginica": 20}
